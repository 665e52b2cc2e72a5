"""The commands of `upright`, one module per group: `robot` (inspect, build), `running` (run,
suite, render, demo), `analyze`, `many` (sweep, tune, margins), `fitting` (fit, compare);
`common` holds what several of them share. `sandbox.cli` registers them on the app."""
