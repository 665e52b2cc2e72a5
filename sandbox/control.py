"""The controller contract, loading user controller scripts, and helpers scripts may import.

A controller script defines a class (``Controller`` by default) with
``__init__(self, config, robot)`` and ``step(self, r) -> (left_duty, right_duty)``;
``r`` is a :class:`Reading`. Scripts may use :class:`Pid`, :class:`ComplementaryTilt`
and :class:`KalmanTilt` from here. Everything is SI; pitch is the rotation about
body +y, positive when the top leans forward. Never touches the physics engine.

This module is the one import path scripts and callers use
(``from sandbox.control import Pid``); the code lives in :mod:`sandbox.contract`
(the errors, :class:`Setpoint`, :class:`Reading`, :class:`RobotFacts`),
:mod:`sandbox.scripts` (loading a script, building its controller, the config keys it
read, failure texts), :mod:`sandbox.duties` (checking what ``step`` returned) and
:mod:`sandbox.helpers` (:class:`Pid`, the tilt estimators, odometry, starting gains).
"""

from __future__ import annotations

from .contract import MAX_LOG_NAME_LENGTH as MAX_LOG_NAME_LENGTH
from .contract import (
    ControllerError,
    ControllerLoadError,
    Reading,
    RobotFacts,
    Setpoint,
)
from .duties import check_duties, duty_floats
from .helpers import GRAVITY as GRAVITY
from .helpers import (
    ComplementaryTilt,
    KalmanTilt,
    Pid,
    WheelOdometry,
    accel_tilt,
    pendulum_gains,
)
from .scripts import DEFAULT_CLASS_NAME as DEFAULT_CLASS_NAME
from .scripts import DEFAULT_RATE_HZ as DEFAULT_RATE_HZ
from .scripts import (
    TrackedConfig,
    controller_rate,
    load_controller_class,
    make_controller,
    script_location,
    tracked_config,
    unread_key_text,
    unread_keys,
)
from .scripts import failure_error as failure_error
from .scripts import failure_text as failure_text

__all__ = [
    "ComplementaryTilt",
    "ControllerError",
    "WheelOdometry",
    "accel_tilt",
    "pendulum_gains",
    "ControllerLoadError",
    "KalmanTilt",
    "Pid",
    "Reading",
    "RobotFacts",
    "Setpoint",
    "TrackedConfig",
    "check_duties",
    "duty_floats",
    "controller_rate",
    "load_controller_class",
    "make_controller",
    "script_location",
    "tracked_config",
    "unread_key_text",
    "unread_keys",
]
