"""Remake the demo bench logs of shelf-runner (DEMO DATA, invented).

The logs come from a secretly different "real" shelf-runner (SECRET below: the battery
mounted 25 mm higher, slower and more frictional motors with a deadband and play, the right
motor a little slower) simulated with upright's bench-test models (sandbox.fit.bench_models:
the full simulation has no static friction, play or per-side motors yet), with gyro noise
and bias, gyro counts in raw form, timestamp jitter and a dropped line. Seeded: running it
again gives the same bytes.

    python robots/bench-logs/make_logs.py
"""

from __future__ import annotations

import math
from pathlib import Path

from sandbox.fit.bench_models import PlanarBody, WheelDrive
from sandbox.fit.synthetic import drop_log, play_log, spin_log, swing_log
from sandbox.robot import load_robot

HERE = Path(__file__).resolve().parent
ROBOT = HERE.parent / "shelf-runner.yaml"
SECRET = {
    "battery_at_z": 0.055,                        # m (the file says 30 mm)
    "no_load_speed_rpm": {"l": 205.0, "r": 197.0},
    "motor_friction": 0.0035, "wheel_friction": 0.001,  # N·m (file: 0.005 in all)
    "motor_static": 0.011,                        # N·m
    "deadband": 0.07,
    "backlash_deg": 2.0,
    "battery_v": 7.3,
}


def secret_spec():
    return load_robot(ROBOT, {"body.parts.0.at": [0, 0, SECRET["battery_at_z"]],
                              "driver.deadband": SECRET["deadband"],
                              "motors.no_load_speed": f"{SECRET['no_load_speed_rpm']['l']} rpm",
                              "motors.friction_torque": SECRET["motor_friction"]
                              + SECRET["wheel_friction"]})


def secret_body() -> PlanarBody:
    spec = secret_spec()
    f = spec.figures
    return PlanarBody(f.body.mass, float(f.body.inertia[1, 1]), f.com_height, f.wheel_mass,
                      f.wheel_inertia_axle, spec.wheels.radius, f.reflected_inertia,
                      SECRET["motor_friction"] + SECRET["wheel_friction"])


def secret_drives() -> tuple[WheelDrive, WheelDrive]:
    spec = secret_spec()
    m, f = spec.motors, spec.figures
    drives = []
    for side in ("l", "r"):
        ke = m.rated_voltage / (SECRET["no_load_speed_rpm"][side] * 2 * math.pi / 60)
        drives.append(WheelDrive(
            resistance=f.resistance, torque_constant=f.torque_constant, back_emf_constant=ke,
            motor_inertia=f.reflected_inertia, wheel_inertia=f.wheel_inertia_axle,
            motor_friction=SECRET["motor_friction"], motor_static=SECRET["motor_static"],
            wheel_friction=SECRET["wheel_friction"], wheel_static=0.0,
            backlash=math.radians(SECRET["backlash_deg"]), deadband=SECRET["deadband"],
            pwm_bits=spec.driver.pwm_bits, brake=spec.driver.off_state == "brake"))
    return drives[0], drives[1]


def secret_mass() -> float:
    """What the kitchen scale says (kg): body plus two wheels."""
    f = secret_spec().figures
    return f.mass


def main() -> None:
    spec = secret_spec()
    body = secret_body()
    counts_per_rad = spec.encoders.counts_per_rev * spec.motors.gear_ratio / (2 * math.pi)
    swing = swing_log(body, damping=3e-4, angle0=math.radians(20), noise=0.004, bias=0.01,
                      jitter=1.5e-3, raw=True, seed=11, dropped=(700,))
    # the drop's gearbox friction is left out: the fit's drop model has none (see README)
    drop = drop_log(PlanarBody(*[getattr(body, k) for k in (
        "body_mass", "pitch_inertia", "com_height", "wheel_mass", "wheel_inertia",
        "wheel_radius", "reflected_inertia")]), noise=0.004, bias=0.01, jitter=2e-4, seed=12,
        dropped=(300,))
    spin = spin_log(secret_drives(), supply_voltage=SECRET["battery_v"],
                    voltage_drop=spec.driver.voltage_drop, counts_per_rad=counts_per_rad,
                    jitter=1e-3, seed=13, dropped=(2500,))
    play = play_log(secret_drives(), supply_voltage=SECRET["battery_v"],
                    voltage_drop=spec.driver.voltage_drop, counts_per_rad=counts_per_rad,
                    seed=14)
    # a board reset in the swing log: the header again and a restart of the clock
    lines = swing.splitlines()
    swing = "\n".join(lines[:40] + [lines[0]] + lines[40:]) + "\n"
    for name, text in (("swing", swing), ("drop", drop), ("spin", spin), ("play", play)):
        # a trailing half line, as a serial log cut off mid-write has
        (HERE / f"shelf-runner-{name}.csv").write_text(text + text.splitlines()[-1][:7])


if __name__ == "__main__":
    main()
