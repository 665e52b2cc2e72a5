"""A controller script as a black box: its linear response, its loop's poles and margins.

- :func:`identify`: probe a fresh instance with small steps and pulses in each input.
- :func:`sampled_plant`, :func:`closed_loop_poles`, :func:`stability_margins`: the loop
  with the robot's linear model, sampled as a run samples it.
- :func:`analyze_controller`: all of it, as ``upright analyze --controller`` reports it.

Never touches the physics engine.
"""

from .loop import (
    ControllerModel,
    Margins,
    SampledPlant,
    SensorGeometry,
    Timing,
    closed_loop_matrix,
    closed_loop_poles,
    is_stable,
    loop_response,
    loop_state_space,
    sampled_plant,
    stability_margins,
)
from .report import analyze_controller, controller_table, plot_loop
from .response import (
    Identified,
    ProbeSizes,
    baseline_reading,
    fit_model,
    fresh_controller,
    identify,
    low_frequency_gains,
    state_feedback_equivalent,
)

__all__ = [
    "ControllerModel",
    "Identified",
    "Margins",
    "ProbeSizes",
    "SampledPlant",
    "SensorGeometry",
    "Timing",
    "analyze_controller",
    "baseline_reading",
    "closed_loop_matrix",
    "closed_loop_poles",
    "controller_table",
    "fit_model",
    "fresh_controller",
    "identify",
    "is_stable",
    "loop_response",
    "loop_state_space",
    "low_frequency_gains",
    "plot_loop",
    "sampled_plant",
    "stability_margins",
    "state_feedback_equivalent",
]
