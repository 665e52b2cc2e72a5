"""Why a run fell or failed its test: findings computed from the trace. Plain numpy.

Each finding is ``{"code", "text", "figures"}``; :func:`diagnose` returns them
most likely cause first: faults of the loop (oscillation, divergence, runaway,
duties asked beyond ±1, a sensor at its range while balancing), then the
disturbance the failure followed, then what the motors ran into (saturation,
top speed), then how the run ended (tilt limit, frame on the floor, a wheel
off the floor). The detectors (``signals``) are pure functions of arrays, so
they are tested on synthetic signals; thresholds are the named constants
(DEVELOPERS.md says which are rules of thumb).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from .signals import (
    exponential_growth,
    fall_rate,
    final_run,
    oscillation,
    speed_limit,
    steady_growth,
    touching_tilt,
    wheel_rates,
)

# -- thresholds (angles in rad, times in s). "Our choice" unless marked common practice.
OSC_MIN_GROWTH = 1.5  # last peak / first peak: "growing" [our choice]
OSC_SUSTAINED_AMPLITUDE = math.radians(1.0)  # a non-growing swing this big still counts
OSC_LINEAR_TILT = math.radians(10.0)  # frequency and growth read below this tilt
DELAY_PHASE = 30.0  # deg of phase lost to the loop's delay that make it the likely cause
RUNAWAY_RATIO = 0.2  # growth below this fraction of the fall rate: a runaway, not a fall
RUNAWAY_MIN_DURATION = 1.0  # s of steady speed growth
RUNAWAY_MIN_SPEED = 0.3  # fraction of the top speed the speed must reach
RUNAWAY_STEADY = 0.8  # fraction of ticks in which |speed| (smoothed) went up
ERROR_WORDS = " error from the setpoint"
RUNAWAY_MIN_TRAVEL = 20.0  # wheel radii of steady travel that count as position runaway
TOP_SPEED_FRACTION = 0.9  # wheel rate / back-EMF limit counted as "at top speed"
DUTY_FULL = 0.99  # |duty| within 1 % of full counts as saturated (a steering term trims a side)
SATURATION_MIN = 0.05  # s of duty at ±1 before the end that count...
SATURATION_SHARE = 0.02  # ...or this share of all ticks at ±1 (or clipped)
CLIPPED_SHARE = 0.5  # share of ticks with clipped duties that makes the output the cause
SENSOR_CLIP_FRACTION = 0.99  # reading / range counted as clipped
FALL_ONSET_TILT = math.radians(5.0)  # a fall's final excursion starts where it left this
WHEEL_LIFT_MIN = 0.002  # m: the axle rising more than this (or 5 % of the radius)...
WHEEL_LIFT_FRACTION = 0.05  # ...above its start on a flat floor means a wheel left it

# the order of the groups (most likely cause first); within a group, by score
GROUPS = {"oscillation": 0, "divergence": 0, "runaway": 0, "sensor_clipped": 0,
          "disturbance": 1, "saturated": 2, "top_speed": 2,
          "wheel_lifted": 3, "frame_touched": 3, "tilt_limit": 3}
DEFAULT_FALL_LIMIT = math.radians(60.0)


def finding(code: str, text: str, score: float = 1.0, group: int | None = None,
            **figures: Any) -> dict[str, Any]:
    """A finding with its ranking (group, then score; both dropped before it is returned)."""
    return {"code": code, "text": text, "figures": figures, "score": float(score),
            "group": GROUPS.get(code, 1) if group is None else group}


# --------------------------------------------------------------------- findings


def _deg(value: float) -> float:
    return math.degrees(value)


def _ending(trace, spec, status, fall_limit, flat_floor) -> list[dict]:
    """What ended the run: the tilt limit, the frame on the floor, a wheel off it."""
    t, pitch = trace["t_s"], trace["pitch_rad"]
    out = []
    if status == "fell":
        last = float(pitch[-1])
        if abs(last) > fall_limit:
            out.append(finding(
                "tilt_limit", f"ended at the tilt limit: {_deg(last):+.1f} deg at {t[-1]:.3f} s "
                f"(limit {_deg(fall_limit):.0f} deg)", 1.0,
                t_s=float(t[-1]), pitch_deg=_deg(last), limit_deg=_deg(fall_limit)))
        else:
            flat = touching_tilt(spec)
            where = ("as its geometry predicts on a flat floor" if abs(abs(last) - flat)
                     < math.radians(10.0) else
                     f"where a flat floor would take {_deg(flat):.0f} deg: the floor or a "
                     "payload met it first")
            out.append(finding(
                "frame_touched", f"ended when the frame touched the floor at {_deg(last):+.1f} "
                f"deg ({t[-1]:.3f} s), before the {_deg(fall_limit):.0f} deg tilt limit, {where}",
                1.0, t_s=float(t[-1]), pitch_deg=_deg(last), flat_floor_touch_deg=_deg(flat),
                limit_deg=_deg(fall_limit)))
    if flat_floor and "pose_z_m" in trace and t.size > 1:
        com = spec.figures.body.com
        axle = trace["pose_z_m"] - (-com[0] * np.sin(pitch) + com[2] * np.cos(pitch))
        rise = axle - axle[0]
        lift = max(WHEEL_LIFT_MIN, WHEEL_LIFT_FRACTION * spec.wheels.radius)
        up = np.nonzero(rise > lift)[0]
        if up.size:
            i = int(up[0])
            out.append(finding(
                "wheel_lifted", f"the wheels left the floor at {t[i]:.3f} s: the axle rose "
                f"{1000 * rise.max():.1f} mm (tilt {_deg(pitch[i]):+.1f} deg then)", 0.5,
                t_s=float(t[i]), rise_m=float(rise.max()), pitch_deg=_deg(pitch[i])))
    return out


def _saturation(trace, summary) -> dict | None:
    t = trace["t_s"]
    sides = {}
    for side in ("l", "r"):
        duty = trace[f"duty_{side}"]
        sat = np.abs(duty) >= DUTY_FULL
        held, since = final_run(t, sat)
        sides[side] = (held, float(np.sign(duty[-1])), float(np.mean(sat)), since)
    clipped = int(summary.get("clipped_duties") or 0)
    held = max(sides["l"][0], sides["r"][0])
    fraction = max(sides["l"][2], sides["r"][2])
    share_clipped = clipped / max(1, t.size)
    if held < SATURATION_MIN and fraction < SATURATION_SHARE and share_clipped < SATURATION_SHARE:
        return None
    both = abs(sides["l"][0] - sides["r"][0]) < 1e-9 or min(sides["l"][0], sides["r"][0]) >= \
        0.9 * held  # the same stretch on both sides, to a tick or two
    key = "l" if sides["l"][0] >= sides["r"][0] else "r"
    other = "r" if key == "l" else "l"
    names = {"l": "left", "r": "right"}
    side = "both sides" if both else names[key]
    sign = "+1" if sides[key][1] > 0 else "-1"
    also = "" if both else f", the {names[other]} {sides[other][0]:.2f} s"
    text = (f"duty at {sign} on {side} for the last {held:.2f} s (from {sides[key][3]:.2f} s"
            f"{also}): the motors gave all they had" if held >= SATURATION_MIN else
            f"duty at ±1 in {100 * fraction:.0f} % of ticks")
    raw = [trace[c] for c in ("duty_raw_l", "duty_raw_r") if c in trace]
    asked = float(np.nanmax(np.abs(np.concatenate(raw)))) if raw else None
    if clipped:
        text += (f"; the controller asked for more than ±1 on {clipped} ticks"
                 + (f" (up to {asked:.3g})" if asked is not None else "") + ", clipped")
    if share_clipped > CLIPPED_SHARE:
        text += ": its output is out of range most of the time; scale it to [-1, 1]"
    else:
        text += ": lower the gains, or stronger motors or a higher battery voltage"
    mostly = share_clipped > CLIPPED_SHARE
    return finding("saturated", text, 1.0 if mostly else 0.6 + 0.4 * fraction,
                   group=0 if mostly else None,
                   final_s=held, side=side, sign=sign, fraction=fraction,
                   clipped_ticks=clipped, largest_asked=asked)


def _top_speed(trace, spec) -> dict | None:
    t = trace["t_s"]
    rates = np.abs(wheel_rates(trace, spec))
    limit = speed_limit(trace, spec)
    ratio = rates.max(axis=0) / limit
    if ratio.size == 0 or np.nanmax(ratio) < TOP_SPEED_FRACTION:
        return None
    i = int(np.nanargmax(ratio >= TOP_SPEED_FRACTION))
    peak = int(np.nanargmax(ratio))
    r = spec.wheels.radius
    return finding(
        "top_speed", f"the wheels reached {100 * ratio[peak]:.0f} % of the top speed the "
        f"battery and driver allow ({limit[peak]:.1f} rad/s, {limit[peak] * r:.2f} m/s) at "
        f"{t[peak]:.2f} s, {100 * TOP_SPEED_FRACTION:.0f} % from {t[i]:.2f} s: at top speed "
        "the back-EMF leaves no torque to catch a lean", 0.8 + 0.2 * float(ratio[peak]),
        fraction=float(ratio[peak]), t_s=float(t[peak]), reached_s=float(t[i]),
        limit_rad_s=float(limit[peak]), limit_m_s=float(limit[peak] * r))


def _sensors(trace, spec, fell: bool) -> list[dict]:
    t, pitch = trace["t_s"], trace["pitch_rad"]
    out = []
    calm = np.nonzero(np.abs(pitch) < FALL_ONSET_TILT)[0]
    onset = float(t[calm[-1]]) if fell and calm.size else math.inf
    for kind, rng, unit, scale in (("gyro", spec.imu.gyro.range, "deg/s", 180 / math.pi),
                                   ("accel", spec.imu.accel.range, "m/s^2", 1.0)):
        axes = [a for a in "xyz" if f"{kind}_{a}_{'rad_s' if kind == 'gyro' else 'm_s2'}"
                in trace]
        cols = {a: trace[f"{kind}_{a}_{'rad_s' if kind == 'gyro' else 'm_s2'}"] for a in axes}
        hit = {a: np.abs(v) >= SENSOR_CLIP_FRACTION * rng for a, v in cols.items()}
        clipped = [a for a in axes if hit[a].any()]
        if not clipped:
            continue
        any_hit = np.any([hit[a] for a in clipped], axis=0)
        i = int(np.argmax(any_hit))
        balancing = bool(np.any(any_hit & (t <= onset)))
        when = ("while balancing: the controller saw false readings; "
                "choose a larger range" if balancing else
                "only during the fall: a consequence, not the cause")
        out.append(finding(
            "sensor_clipped", f"{kind} at its range ({rng * scale:.4g} {unit}) on "
            f"{', '.join(clipped)} from {t[i]:.3f} s, {int(any_hit.sum())} ticks, {when}",
            0.9 if balancing else 0.1, group=0 if balancing else 3, sensor=kind, axes=clipped,
            first_s=float(t[i]),
            ticks=int(any_hit.sum()), range=float(rng), while_balancing=balancing))
    return out


def _loop(trace, spec, start, settings, rate_hz, drift_limit: float | None = None
          ) -> list[dict]:
    """Oscillation, divergence or runaway in the tilt and travel after ``start`` (s)."""
    t_all = trace["t_s"]
    window = t_all >= start
    t, pitch = t_all[window], trace["pitch_rad"][window]
    if t.size < 5:
        return []
    out = []
    # where the tilt was before the event (a robot on a slope leans into it), else upright
    before = (t_all >= start - 0.5) & (t_all < start)
    reference = float(np.median(trace["pitch_rad"][before])) if before.any() else 0.0
    linear = np.abs(pitch) <= OSC_LINEAR_TILT
    cut = int(np.argmin(linear)) if not linear.all() else pitch.size
    saturated = ((np.abs(trace["duty_l"][window]) >= DUTY_FULL)
                 | (np.abs(trace["duty_r"][window]) >= DUTY_FULL))
    unsaturated = int(np.argmax(saturated)) if saturated.any() else pitch.size
    swing = None
    for end in sorted({min(cut, unsaturated), cut}):  # the linear part first
        if swing is None and end >= 5:
            swing = oscillation(t[:end], pitch[:end] - reference)
    if swing is not None:
        growth, freq = swing["growth_rate_1_s"], swing["frequency_hz"]
        per_cycle = math.exp(growth / freq) if freq > 0 else math.inf
        growing = swing["last_peak"] >= OSC_MIN_GROWTH * swing["first_peak"] and growth > 0
        if growing or swing["last_peak"] >= OSC_SUSTAINED_AMPLITUDE:
            delay = (getattr(settings, "latency", 0.0) or 0.0) + 0.5 / rate_hz
            phase = 360.0 * freq * delay
            reading = (f"the loop's delay ({1000 * delay:.0f} ms, latency and the duty held "
                       "over each period) "
                       f"costs {phase:.0f} deg of phase at this frequency: too much gain for "
                       "that delay; lower the gains or cut the delay" if phase >= DELAY_PHASE
                       else "too little damping: raise the pitch-rate gain (kd) or lower kp")
            kind = "growing" if growing else "sustained"
            out.append(finding(
                "oscillation", f"{kind} oscillation of the tilt at {freq:.2f} Hz, amplitude "
                f"{_deg(swing['first_peak']):.2g} -> {_deg(swing['last_peak']):.2g} deg "
                f"({growth:+.2f} 1/s, x{per_cycle:.2f} a cycle) from {swing['start_s']:.2f} s: "
                + reading, 1.0 if growing else 0.7, frequency_hz=freq, growth_rate_1_s=growth,
                growth_per_cycle=per_cycle, half_cycles=swing["half_cycles"],
                start_s=swing["start_s"], delay_s=delay, delay_phase_deg=phase))
    # a divergence is read where the motors still had something to give
    free = ((np.abs(trace["duty_l"][window]) < DUTY_FULL)
            & (np.abs(trace["duty_r"][window]) < DUTY_FULL)
            & (np.abs(wheel_rates(trace, spec)[:, window]).max(axis=0)
               < TOP_SPEED_FRACTION * speed_limit(trace, spec)[window]))
    last_free = int(np.nonzero(free)[0][-1]) + 1 if free.any() else 0
    grow = exponential_growth(t[:last_free], pitch[:last_free] - reference) if (
        swing is None and last_free >= 3) else None
    own = fall_rate(spec)
    slow = grow is not None and own > 0 and grow["growth_rate_1_s"] < RUNAWAY_RATIO * own
    if grow is not None and not slow:
        rate = grow["growth_rate_1_s"]
        share = rate / own if own > 0 else math.inf
        out.append(finding(
            "divergence", f"the tilt grew steadily without swinging back from "
            f"{grow['start_s']:.2f} s, e-fold every {1 / rate:.2f} s ({rate:.2f} 1/s), while "
            f"the motors still had duty to spare: too little gain for this robot, which falls "
            f"at {own:.2f} 1/s on its own ({100 * share:.0f} % of that remains): raise the tilt "
            "gain (kp), then the pitch-rate gain", 1.0, growth_rate_1_s=rate,
            fall_rate_1_s=own, share_of_fall_rate=share, start_s=grow["start_s"]))
    # travel is read before the final fall: falling speeds the wheels up in any robot
    calm = np.nonzero(np.abs(pitch - reference) < FALL_ONSET_TILT)[0]
    upright = int(calm[-1]) + 1 if calm.size else 0
    speed = trace["speed_m_s"][window][:upright]
    # where a test commands a speed (drive), what runs away is the speed's error from it
    setpoint = trace.get("setpoint_speed_m_s")
    commanded = setpoint is not None and bool(np.any(setpoint[window] != 0.0))
    if commanded:
        speed = speed - setpoint[window][:upright]
    rise = steady_growth(t[:upright], speed)
    top = float(np.median(speed_limit(trace, spec)[window])) * spec.wheels.radius
    if rise is not None:
        reached = rise["peak"]
        long = rise["end_s"] - rise["start_s"] >= RUNAWAY_MIN_DURATION
        if long and reached >= RUNAWAY_MIN_SPEED * top and rise["rising_share"] >= RUNAWAY_STEADY:
            x = trace["x_m"][window][:upright]
            travel = float(x[-1] - x[0])
            out.append(finding(
                "runaway", f"runaway travel: the speed{ERROR_WORDS if commanded else ''} "
                f"grew steadily from {rise['start_s']:.2f} "
                f"to {rise['end_s']:.2f} s, to {reached:.2f} m/s ({100 * reached / top:.0f} % "
                f"of top speed), {travel:+.2f} m travelled: nothing feeds back wheel speed or "
                "position (or with the wrong sign); add wheel-speed feedback from the encoders",
                0.9 if grow is None or slow else 0.5, start_s=rise["start_s"],
                end_s=rise["end_s"], speed_m_s=reached, top_speed_m_s=top, travel_m=travel,
                tilt_growth_rate_1_s=None if grow is None else grow["growth_rate_1_s"]))
            return out
    if upright < 3 or commanded:  # travel is what a commanded speed asks for
        return out
    x = trace["x_m"][window][:upright] - trace["x_m"][window][0]
    drift = steady_growth(t[:upright], x)
    travel = float(x[-1])
    far = drift_limit if drift_limit is not None else RUNAWAY_MIN_TRAVEL * spec.wheels.radius
    if (drift is not None and drift["end_s"] - drift["start_s"] >= RUNAWAY_MIN_DURATION
            and drift["rising_share"] >= RUNAWAY_STEADY and abs(travel) >= far
            and not any(f["code"] == "oscillation" for f in out)):  # a swing can walk it off
        out.append(finding(
            "runaway", f"the robot kept rolling {'forward' if travel > 0 else 'backward'}: "
            f"{travel:+.2f} m from {drift['start_s']:.2f} to {drift['end_s']:.2f} s at a "
            "steady speed: nothing feeds back position; add a position term (or a speed "
            "setpoint that brings it back)", 0.6, start_s=drift["start_s"],
            end_s=drift["end_s"], travel_m=travel))
    return out


def _failure_time(trace, summary, test_result) -> tuple[float, bool]:
    """When the run failed: the fall, else the moment the first failed check was lost.

    The flag is False for a recovery that never came: the time is then the
    disturbance's own.
    """
    t = trace["t_s"]
    if summary.get("fell_at_s") is not None:
        return float(summary["fell_at_s"]), True
    for check in (test_result or {}).get("checks", []):
        if check.get("passed"):
            continue
        if check.get("label") == "position held" and check.get("limit_value") is not None:
            target = trace.get("setpoint_speed_m_s")
            expected = (np.cumsum(target * np.diff(t, prepend=t[0])) if target is not None
                        else np.zeros_like(t))
            over = np.nonzero(np.abs(trace["x_m"] - expected) > check["limit_value"])[0]
            if over.size:
                return float(t[over[0]]), True
        if str(check.get("label", "")).startswith("back within"):
            return _worst_recovery(trace, test_result), False
    return float(t[-1]) if t.size else 0.0, True


def _worst_recovery(trace, test_result) -> float:
    """The disturbance after which the tilt ended farthest from where it was before."""
    t, pitch = trace["t_s"], trace["pitch_rad"]
    times = sorted(test_result.get("disturbance_times_s") or [])
    worst, when = -1.0, float(t[-1])
    for i, start in enumerate(times):
        end = times[i + 1] if i + 1 < len(times) else float(t[-1]) + 1e-9
        before = (t >= start - 0.5) & (t < start)
        ref = float(np.median(pitch[before])) if before.any() else 0.0
        inside = np.nonzero((t >= start) & (t < end))[0]
        if inside.size and abs(pitch[inside[-1]] - ref) > worst:
            worst, when = abs(pitch[inside[-1]] - ref), float(start)
    return when


def fall_onset(t: np.ndarray, pitch: np.ndarray, fell_at: float) -> float | None:
    """When the fall began (s): the last sample up to ``fell_at`` with the tilt within
    FALL_ONSET_TILT of its usual level (the median tilt until then: a robot holding a
    slope leans into it); None if it never was."""
    upto = np.nonzero(t <= fell_at + 1e-9)[0]
    if upto.size == 0:
        return None
    held = pitch[upto]
    usual = float(np.median(held))
    calm = np.nonzero(np.abs(held - usual) < FALL_ONSET_TILT)[0]
    return float(t[upto[calm[-1]]]) if calm.size else None


def _disturbance(marks, failed_at: float, fell: bool, settled: bool = True,
                 onset: float | None = None, tick: float = 0.0) -> dict:
    """Which event of the test the failure followed (time, kind, size).

    For a fall with its ``onset`` known, the last event at or before the onset (within a
    tick, ``tick`` s): an event that came once the robot was already falling is named
    as such, not blamed."""
    before = [(float(m[0]), str(m[1])) for m in marks if float(m[0]) <= failed_at + 1e-9]
    what = "fell" if fell else "failed"
    if not before:
        return finding("disturbance", f"{what} at {failed_at:.2f} s before any event of the "
                       "test: the robot cannot do it undisturbed; fix that first", 1.0,
                       t_s=None, kind=None, size=None, failed_at_s=failed_at)
    during: list[tuple[float, str]] = []
    if fell and onset is not None:
        leading = [m for m in before if m[0] <= onset + tick + 1e-9]
        if leading:
            during = before[len(leading):]
            before = leading
    when, label = before[-1]
    kind, _, size = label.partition(" ")
    if kind in ("gyro", "accel", "encoder"):
        kind, size = " ".join(label.split()[:2]), " ".join(label.split()[2:])
    text = (f"{what} {failed_at - when:.2f} s after the {label} at {when:.2f} s" if settled
            else f"the tilt never settled back after the {label} at {when:.2f} s")
    if during:
        text += (" (already falling from " + f"{onset:.2f} s when "
                 + ", ".join(f"the {lbl} at {at:.2f} s" for at, lbl in during) + " came)")
    return finding("disturbance", text, 0.8, t_s=when, kind=kind, size=size or None,
                   failed_at_s=failed_at, label=label, onset_s=onset,
                   during_fall=[{"t_s": at, "label": lbl} for at, lbl in during])


def diagnose(trace: dict[str, np.ndarray], summary: dict, spec, *, marks=(),
             test_result: dict | None = None, settings=None,
             flat_floor: bool = True) -> list[dict]:
    """Findings on a run that fell or failed, most likely cause first.

    ``trace``: the run's columns (``sandbox.record.read_trace``); ``summary``:
    its summary.json; ``spec``: the robot as run; ``marks``: the test's
    (time s, label) events; ``test_result``: the test's verdict;
    ``settings``: the RunSettings (fall limit, latency); ``flat_floor``: False on
    slopes, steps and rough ground (the wheel-lift check needs a flat floor).
    """
    t = trace.get("t_s", np.zeros(0))
    if t.size < 2:
        return []
    status = summary.get("status", "completed")
    fall_limit = getattr(settings, "fall_limit", DEFAULT_FALL_LIMIT)
    rate_hz = summary.get("rate_hz") or 1.0 / float(np.median(np.diff(t)))
    failed = test_result is not None and not test_result.get("passed", True)
    found = _ending(trace, spec, status, fall_limit, flat_floor)
    start = 0.0
    marks = list(marks or (summary.get("marks") or []))
    if failed or (marks and status == "fell"):
        failed_at, settled = _failure_time(trace, summary, test_result)
        onset = (fall_onset(t, trace["pitch_rad"], failed_at) if status == "fell"
                 else None)
        event = _disturbance(marks, failed_at, status == "fell", settled, onset,
                             1.0 / rate_hz)
        found.append(event)
        if event["figures"]["t_s"] is not None:
            start = event["figures"]["t_s"]
    drift_limit = next((c.get("limit_value") for c in (test_result or {}).get("checks", [])
                        if c.get("label") == "position held" and not c.get("passed")), None)
    loop = _loop(trace, spec, start, settings, rate_hz, drift_limit)
    if start > 0 and not loop:  # nothing after the event: look at the whole run
        loop = _loop(trace, spec, 0.0, settings, rate_hz, drift_limit)
    found += loop
    for extra in (_saturation(trace, summary), _top_speed(trace, spec)):
        if extra is not None:
            found.append(extra)
    found += _sensors(trace, spec, status == "fell")
    found.sort(key=lambda f: (f["group"], -f["score"]))
    return [{"code": f["code"], "text": f["text"], "figures": f["figures"]} for f in found]


def needs_diagnosis(status: str, test_result: dict | None) -> bool:
    """Whether a run gets a diagnosis: it fell, or it ran and failed its test."""
    if status in ("controller_error", "interrupted"):
        return False
    return status == "fell" or (test_result is not None and not test_result.get("passed", True))
