"""The unit spellings read without pint: for each kind of quantity, the spellings of
:mod:`sandbox.unitfactors` (generated from this list by ``python tests/test_unit_factors.py``).

Each is written as a robot file writes it; ``units._rewrite`` turns it into pint's spelling
('g' -> 'g0' where an acceleration is meant, 'sqrt(Hz)' -> '(Hz)**0.5', 'Nm' -> 'N*m'),
which is the key of the table. Any other spelling still goes to pint.
"""

from __future__ import annotations

SPELLINGS: dict[str, tuple[str, ...]] = {
    "length": ("m", "mm", "cm", "km", "um", "µm", "in", "ft"),
    "mass": ("kg", "g", "mg", "oz", "lb"),
    "voltage": ("V", "mV", "kV"),
    "current": ("A", "mA", "uA", "µA"),
    "resistance": ("ohm", "mohm", "kohm"),
    "torque": ("N*m", "mN*m", "N*cm", "N*mm", "kgf*cm", "kgf*mm", "kgf*m", "gf*cm", "ozf*in",
               "lbf*in", "lbf*ft"),
    "angular_speed": ("rpm", "rad/s", "deg/s", "deg/ms"),
    "angle": ("rad", "mrad", "deg", "degree", "degrees"),
    "frequency": ("Hz", "kHz", "MHz"),
    "time": ("s", "ms", "us", "µs", "ns", "min", "h"),
    "acceleration": ("m/s^2", "m/s**2", "mm/s^2", "g"),
    "inertia": ("kg*m^2", "kg*m**2", "kg*cm^2", "kg*mm^2", "g*cm^2", "g*mm^2"),
    "charge": ("mAh", "Ah", "C", "mA*h", "A*h"),
    "speed": ("m/s", "mm/s", "cm/s", "km/h"),
    "force": ("N", "mN", "kgf", "gf"),
    "impulse": ("N*s", "mN*s"),
    "gyro_density": ("deg/s/sqrt(Hz)", "rad/s/sqrt(Hz)", "deg/s/√Hz", "rad/s/√Hz"),
    "accel_density": ("g/sqrt(Hz)", "m/s^2/sqrt(Hz)", "g/√Hz", "m/s^2/√Hz"),
    "gyro_walk": ("deg/s^2/sqrt(Hz)", "rad/s^2/sqrt(Hz)", "deg/s/sqrt(s)", "rad/s/sqrt(s)"),
    "accel_walk": ("m/s^3/sqrt(Hz)", "g/s/sqrt(Hz)", "m/s^2/sqrt(s)"),
    "fraction": ("%", "percent", "ppm"),
}
