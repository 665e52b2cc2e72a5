"""What a sweep runs: grid axes (``--vary``), tolerances (``--spread``) and the points.

A key is anything ``--set`` accepts: a dotted robot key (``wheels.friction``,
``body.parts.0.mass``) or a controller key (``config.kp``). Values are plain
numbers in SI units (the robot file's bare-number convention).

Points are numbered cell by cell (the grid in row-major order, the last
``--vary`` changing fastest) and, inside a cell, sample by sample. Every random
draw comes from its own generator seeded by (base seed, sample number, key), so
a point's values never depend on the order points run in, on the executor, or
on which other tolerances are listed.
"""

from __future__ import annotations

import itertools
import math
import re
import zlib
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

CONFIG_PREFIX = "config."
MAX_AXIS_POINTS = 10_000


class SweepError(ValueError):
    """Sweep input that cannot be used: an unreadable --vary or --spread, a bad key, a
    folder that holds a different sweep."""


@dataclass(frozen=True)
class Axis:
    """One grid axis: a key and the values it takes (SI numbers)."""

    key: str
    values: tuple[float, ...]


@dataclass(frozen=True)
class Spread:
    """A tolerance: ``key`` is drawn uniformly within ±amount of its nominal value.

    ``relative``: amount is a fraction of the nominal value (``±5%`` -> 0.05);
    otherwise it is in the key's SI unit.
    """

    key: str
    amount: float
    relative: bool

    def apply(self, nominal: float, unit_draw: float) -> float:
        """The value for a draw ``unit_draw`` in [-1, 1]."""
        if self.relative:
            return nominal * (1.0 + self.amount * unit_draw)
        return nominal + self.amount * unit_draw

    def describe(self) -> str:
        return (f"±{100 * self.amount:g}%" if self.relative else f"±{self.amount:g}")


@dataclass(frozen=True)
class Point:
    """One run of a sweep: its number, grid cell, sample, parameter values and run seed."""

    index: int
    cell: int
    sample: int
    values: Mapping[str, float]
    seed: int

    def robot_values(self) -> dict[str, float]:
        return {k: v for k, v in self.values.items() if not k.startswith(CONFIG_PREFIX)}

    def config_values(self) -> dict[str, float]:
        return {k[len(CONFIG_PREFIX):]: v for k, v in self.values.items()
                if k.startswith(CONFIG_PREFIX)}


# --------------------------------------------------------------------- parsing


def check_key(key: str, option: str) -> str:
    """A key as --set accepts it; raises SweepError for an empty or malformed one."""
    key = key.strip()
    parts = key.split(".")
    if not key or not all(parts) or key == CONFIG_PREFIX.rstrip("."):
        raise SweepError(f"{option} {key!r}: expected a dotted key such as wheels.friction "
                         "or config.kp")
    return key


def _number(text: str, option: str, whole: str, key: str = "") -> float:
    """A number (SI), or a unit string read for ``key`` as --set reads it ('35 mm')."""
    try:
        value = float(text.strip())
    except ValueError:
        from ..robot import value_to_si
        from ..units import UnitError

        try:
            value = value_to_si(key, text.strip())
        except UnitError as err:
            raise SweepError(f"{option} {whole!r}: {text.strip()!r} is not a number in SI or "
                             f"a value with a unit as --set takes ({err})") from None
    if not math.isfinite(value):
        raise SweepError(f"{option} {whole!r}: values must be finite")
    return value


def _clean(value: float) -> float:
    """12 significant figures: 0.3..0.9 n=4 gives 0.5, not 0.49999999999999994."""
    return float(f"{value:.12g}")


VARY_FORMS = "KEY=A,B,C (a list) or KEY=START..STOP,n=N (N values, both ends included)"
VARY_EXAMPLE = "wheels.friction=0.3..0.9,n=4"
# START..STOP then the count, separated by a comma or spaces: "0.3..0.9,n=4", "0.3..0.9 n=4"
_RANGE = re.compile(r"^(?P<start>.+?)\.\.(?P<stop>.+?)(?:\s*,\s*|\s+)n\s*=\s*(?P<count>\S+)$")


@dataclass(frozen=True)
class VaryForm:
    """How an axis was written: ``list``, ``range``, or ``colon`` (the deprecated
    START:STOP:N); ``note`` is what to tell the user about it (empty: nothing)."""

    form: str
    note: str = ""


def vary_form(text: str) -> VaryForm:
    """Which form a --vary text uses, with a deprecation note for START:STOP:N."""
    _key, _sep, spec = text.partition("=")
    if spec.count(":") == 2 and ".." not in spec:
        start, stop, count = (p.strip() for p in spec.split(":"))
        return VaryForm("colon", f"--vary {text!r}: START:STOP:N is deprecated and will be "
                        f"removed in the next release; write {_key.strip()}={start}..{stop},"
                        f"n={count} (the same {count} values)")
    return VaryForm("range" if ".." in spec else "list")


def _count(text: str, whole: str) -> int:
    try:
        count = int(text.strip())
    except ValueError:
        count = 0
    if not 1 <= count <= MAX_AXIS_POINTS:
        raise SweepError(f"--vary {whole!r}: n (how many values) must be a whole number from "
                         f"1 to {MAX_AXIS_POINTS}, got {text.strip()!r}")
    return count


def _values(texts: Sequence[str], whole: str, key: str = "") -> list[float]:
    """Each text as an SI number, or a unit string read for ``key`` as --set reads it."""
    return [_number(text, "--vary", whole, key) for text in texts]


def parse_vary(text: str) -> Axis:
    """One grid axis from ``--vary``.

    - ``KEY=A,B,C``: exactly these values;
    - ``KEY=START..STOP,n=N`` (or with a space before ``n=``): N evenly spaced
      values from START to STOP, both included;
    - ``KEY=START:STOP:N``: the same N values, deprecated (see :func:`vary_form`).
    """
    key, sep, spec = text.partition("=")
    if not sep:
        raise SweepError(f"--vary {text!r}: expected {VARY_FORMS}, e.g. {VARY_EXAMPLE}")
    key = check_key(key, "--vary")
    spec = spec.strip()
    form = vary_form(text).form
    if form == "colon":
        start_text, stop_text, count_text = spec.split(":")
        start, stop = _values((start_text, stop_text), text, key)
        count = _count(count_text, text)
        values = tuple(_clean(v) for v in np.linspace(start, stop, count))
    elif form == "range":
        match = _RANGE.match(spec)
        if match is None:
            raise SweepError(f"--vary {text!r}: a range needs its count written out: "
                             f"START..STOP,n=N, e.g. {VARY_EXAMPLE}")
        start, stop = _values((match["start"], match["stop"]), text, key)
        count = _count(match["count"], text)
        if count == 1 and start != stop:
            raise SweepError(f"--vary {text!r}: n=1 gives one value, but START and STOP "
                             "differ; give n=2 or more, or a single value")
        values = tuple(_clean(v) for v in np.linspace(start, stop, count))
    elif spec and ":" not in spec:
        values = tuple(_values(spec.split(","), text, key))
    else:
        raise SweepError(f"--vary {text!r}: expected {VARY_FORMS}, e.g. {VARY_EXAMPLE}")
    return Axis(key, values)


def axis_text(axis: Axis, shown: int = 12) -> str:
    """One line naming an axis and its values, for the terminal before a sweep starts."""
    from ..tables import fmt

    values = [fmt(v) for v in axis.values]
    if len(values) > shown:
        values = values[:shown // 2] + ["..."] + values[-shown // 2:]
    count = len(axis.values)
    return f"{axis.key}: {', '.join(values)} ({count} value{'s' if count != 1 else ''})"


_SPREAD = re.compile(r"^(?:±|\+-|\+/-)?\s*([0-9.]+(?:[eE][+-]?[0-9]+)?(?:\s*[^\s%0-9.][^%]*)?)"
                     r"\s*(%?)$")  # a number, optionally with a unit ('±2 mm'), or X%


def parse_spread(text: str) -> Spread:
    """``KEY=±X%`` (relative to the nominal value) or ``KEY=±X`` (absolute, SI units).

    ``+-`` may stand for ``±``; a bare ``X%`` means ``±X%``.
    """
    key, sep, spec = text.partition("=")
    if not sep:
        raise SweepError(f"--spread {text!r}: expected KEY=±X% or KEY=±X, "
                         "e.g. body.parts.0.mass=±5%")
    key = check_key(key, "--spread")
    match = _SPREAD.match(spec.strip())
    if match is None:
        raise SweepError(f"--spread {text!r}: expected ±X% (relative) or ±X (absolute, SI)")
    relative = bool(match.group(2))
    if relative and not re.fullmatch(r"[0-9.eE+-]+", match.group(1).strip()):
        raise SweepError(f"--spread {text!r}: a relative spread is a plain percentage (±5%)")
    amount = _number(match.group(1), "--spread", text, key)
    if relative:
        if amount >= 100.0:
            raise SweepError(f"--spread {text!r}: a relative spread must be below ±100%")
        amount /= 100.0
    return Spread(key, amount, relative)


# --------------------------------------------------------------------- nominal values


def nominal_value(key: str, robot: Mapping[str, Any], config: Mapping[str, Any]) -> float:
    """The value ``key`` has before any sweep: from the SI robot description or the config."""
    if key.startswith(CONFIG_PREFIX):
        name = key[len(CONFIG_PREFIX):]
        value = config.get(name)
        if value is None:
            raise SweepError(f"{key}: no value in the controller config to spread around; "
                             f"give one with --set {key}=VALUE or a --config file")
    else:
        node: Any = robot
        parts = key.split(".")
        if (len(parts) == 3 and parts[0] in ("motors", "wheels") and parts[1] in ("left", "right")
                and parts[2] not in (robot.get(parts[0], {}).get(parts[1]) or {})):
            parts = [parts[0], parts[2]]  # a side without its own value has the section's
        for part in parts:
            try:
                node = node[int(part)] if isinstance(node, list) else node[part]
            except (KeyError, IndexError, ValueError, TypeError):
                raise SweepError(f"{key}: no value in the robot description to spread around "
                                 "(check the key; an optional key the file leaves out, such as "
                                 f"imu.gyro.bandwidth, needs one: --set {key}=VALUE)") from None
        value = node
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise SweepError(f"{key}: the value {value!r} is not a number, so it cannot be spread")
    return float(value)


# --------------------------------------------------------------------- points


def unit_draw(seed: int, sample: int, key: str) -> float:
    """A uniform draw in [-1, 1) for ``key`` in Monte Carlo sample ``sample``."""
    rng = np.random.default_rng([seed, sample, zlib.crc32(key.encode("utf-8"))])
    return float(rng.uniform(-1.0, 1.0))


def sample_seed(seed: int, sample: int) -> int:
    """The run seed (sensor noise and bias) of Monte Carlo sample ``sample``."""
    return int(np.random.SeedSequence([seed, sample]).generate_state(1)[0])


def make_points(axes: Sequence[Axis], spreads: Sequence[Spread], samples: int, seed: int,
                nominal: Callable[[str], float]) -> list[Point]:
    """Every point of a sweep, numbered.

    Without ``samples`` every point runs with the base ``seed`` (common random
    numbers: neighbouring grid cells differ only in their parameters). With
    ``samples`` = N each grid cell runs N samples; sample s draws each spread key
    around its nominal value (the grid value when the key is also on an axis) and
    runs with its own seed, both from (seed, s): every cell sees the same N
    robots, and for a sweep without a grid s is the point number.
    """
    if seed < 0:
        raise SweepError(f"the seed must be zero or more, got {seed}")
    if samples < 0:
        raise SweepError(f"--samples must be zero or more, got {samples}")
    if spreads and not samples:
        raise SweepError("--spread needs --samples N (how many robots to draw)")
    keys = [a.key for a in axes]
    if len(set(keys)) != len(keys):
        raise SweepError("each key may appear in one --vary only")
    spread_keys = [s.key for s in spreads]
    if len(set(spread_keys)) != len(spread_keys):
        raise SweepError("each key may appear in one --spread only")
    nominals = {s.key: nominal(s.key) for s in spreads if s.key not in keys}
    per_cell = max(samples, 1)
    points: list[Point] = []
    for cell, cell_values in enumerate(itertools.product(*(a.values for a in axes))):
        fixed = dict(zip(keys, cell_values))
        for sample in range(per_cell):
            values = dict(fixed)
            for spread in spreads:
                base = fixed.get(spread.key, nominals.get(spread.key))
                values[spread.key] = spread.apply(base, unit_draw(seed, sample, spread.key))
            run_seed = sample_seed(seed, sample) if samples else seed
            points.append(Point(cell * per_cell + sample, cell, sample, values, run_seed))
    return points
