"""Start-up rules (issue 13 item 2): `upright --help` and `upright inspect` load none of the
heavy libraries they do not need. Each case runs in a fresh interpreter, imports sandbox.cli,
runs the command and lists what ended up in sys.modules. Only the last tests run the engine
(a 0.01 s run)."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import yaml

from sandbox.robot import load_robot

ROOT = Path(__file__).resolve().parent.parent
HEAVY = ("dask", "matplotlib", "scipy", "pint", "pybullet", "jinja2", "rich")

PROBE = """
import json, sys
import sandbox.cli
try:
    sandbox.cli.app(sys.argv[1:], prog_name="upright", standalone_mode=False)
except SystemExit:
    pass
loaded = sorted({name.split(".")[0] for name in sys.modules})
print(json.dumps(loaded))
"""


def loaded_after(*args: str) -> set[str]:
    """Top-level modules loaded after running ``upright ARGS`` in a new interpreter."""
    done = subprocess.run([sys.executable, "-c", PROBE, *args], capture_output=True,
                          text=True, timeout=120, cwd=ROOT)
    assert done.returncode == 0, done.stderr
    return set(json.loads(done.stdout.strip().splitlines()[-1]))


def si_robot_file(folder: Path) -> Path:
    """desk-mite written with plain SI numbers only: no unit string for pint to read."""
    data = load_robot(ROOT / "robots" / "desk-mite.yaml").to_si_dict()
    for part in data["body"]["parts"]:
        if part.get("colour") is None:
            part.pop("colour", None)
    path = folder / "si-only.yaml"
    path.write_text(yaml.safe_dump(data))
    return path


def test_import_of_the_cli_loads_nothing_heavy():
    loaded = loaded_after("--version")
    assert not loaded & {*HEAVY, "numpy", "pydantic"}, loaded & {*HEAVY, "numpy", "pydantic"}


def test_help_loads_nothing_heavy():
    loaded = loaded_after("--help")
    assert not loaded & set(HEAVY), loaded & set(HEAVY)


def test_command_help_loads_nothing_heavy():
    loaded = loaded_after("run", "--help")
    assert not loaded & set(HEAVY), loaded & set(HEAVY)


def test_inspect_of_a_demo_robot_loads_nothing_heavy():
    """The demo robots' unit strings are all read from pint's factor table: no pint."""
    for name in ("desk-mite", "shelf-runner", "tall-mast"):
        loaded = loaded_after("inspect", str(ROOT / "robots" / f"{name}.yaml"))
        assert not loaded & set(HEAVY), (name, loaded & set(HEAVY))


def test_inspect_of_a_spelling_off_the_table_loads_pint_but_not_dask_or_scipy(tmp_path):
    """A unit pint alone knows (a furlong) builds pint, still without dask or scipy."""
    text = (ROOT / "robots" / "desk-mite.yaml").read_text(encoding="utf-8")
    assert "track: 90 mm" in text
    path = tmp_path / "furlong.yaml"
    path.write_text(text.replace("track: 90 mm", "track: 0.00044738725 furlong"),
                    encoding="utf-8")
    loaded = loaded_after("inspect", str(path))
    assert "pint" in loaded
    assert not loaded & {"dask", "matplotlib", "scipy", "pybullet", "jinja2"}


def test_inspect_of_a_file_in_plain_si_does_not_build_pint(tmp_path):
    path = si_robot_file(tmp_path)
    loaded = loaded_after("inspect", str(path))
    assert not loaded & set(HEAVY), loaded & set(HEAVY)


def test_the_si_file_describes_the_same_robot(tmp_path):
    """The plain-SI copy reads back to the same figures as the file with unit strings."""
    original = load_robot(ROOT / "robots" / "desk-mite.yaml")
    copy = load_robot(si_robot_file(tmp_path))
    assert copy.to_si_dict() == original.to_si_dict()


def submodules_after(*args: str) -> set[str]:
    """Modules (first two parts of each dotted name) loaded after ``upright ARGS``."""
    probe = PROBE.replace('name.split(".")[0]', '".".join(name.split(".")[:2])')
    done = subprocess.run([sys.executable, "-c", probe, *args], capture_output=True,
                          text=True, timeout=120, cwd=ROOT)
    assert done.returncode == 0, done.stderr
    return set(json.loads(done.stdout.strip().splitlines()[-1]))


def test_a_run_without_plots_loads_no_scipy_signal_nor_matplotlib(tmp_path):
    """The IMU's Butterworth filters are designed without scipy.signal (0.65 s to import),
    scipy.linalg waits for an LQR, the demo robot's units need no pint, the URDF's quoting
    no xml.sax (urllib, ssl), the default camera no renderer."""
    loaded = submodules_after("run", str(ROOT / "robots" / "desk-mite.yaml"),
                              str(ROOT / "controllers" / "cascade.py"), "--duration", "0.01",
                              "--no-plots", "--out", str(tmp_path / "run"))
    assert (tmp_path / "run" / "trace.csv").is_file()
    unwanted = {"scipy.signal", "scipy.linalg", "scipy.stats", "matplotlib", "pint", "dask",
                "jinja2", "rich", "xml.sax", "sandbox.render"}
    assert not loaded & unwanted, loaded & unwanted


def test_the_default_camera_is_one_the_renderer_knows():
    """cli._check_camera lets the default 'side' through without importing the renderer."""
    from sandbox.render.frames import CAMERAS

    assert "side" in CAMERAS


def test_a_run_with_plots_loads_matplotlib_but_no_scipy_signal(tmp_path):
    loaded = submodules_after("run", str(ROOT / "robots" / "desk-mite.yaml"),
                              str(ROOT / "controllers" / "cascade.py"), "--duration", "0.01",
                              "--out", str(tmp_path / "run"))
    assert (tmp_path / "run" / "plots.png").is_file()
    assert "matplotlib" in loaded
    assert not loaded & {"scipy.signal", "scipy.linalg", "pint", "dask"}


def test_only_the_world_package_imports_the_engine():
    """Layout rule (DESIGN.md): pybullet is imported in sandbox/world/ alone; rendering and
    the window reach it through ``sandbox.world.pb``."""
    import re

    importing = sorted(
        str(path.relative_to(ROOT)) for path in (ROOT / "sandbox").rglob("*.py")
        if re.search(r"^\s*(import pybullet|from pybullet)", path.read_text(encoding="utf-8"),
                     re.M))
    assert importing == ["sandbox/world/engine.py"]
