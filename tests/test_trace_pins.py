"""Trace bytes pinned before the loop was rebuilt as a schedule.

The robot files and controllers under ``tests_data/pinned`` are copies of the
demo robots and example controllers as they were when these hashes were taken,
so the demo files can gain imperfections without moving the pins. Each pin is
the SHA-256 of the trace's columns of that day (DESIGN.md's columns, the pose,
the wheel angles and the controller's channels), written exactly as the run
wrote them; columns added later are left out, so new columns do not move a pin
but any change to an old one does.
"""

from __future__ import annotations

import csv
import hashlib
import io
from pathlib import Path

import pytest

from sandbox.robot import load_robot
from sandbox.runner import RunSettings
from sandbox.session import run_once

PINNED = Path(__file__).resolve().parent / "tests_data" / "pinned"

# the columns of the trace when the pins were taken, in their order
PINNED_COLUMNS = (
    "t_s,x_m,pitch_rad,pitch_rate_rad_s,yaw_rad,speed_m_s,duty_l,duty_r,current_l_a,current_r_a,"
    "battery_v,gyro_x_rad_s,gyro_y_rad_s,gyro_z_rad_s,accel_x_m_s2,accel_y_m_s2,accel_z_m_s2,"
    "ticks_l,ticks_r,pose_x_m,pose_y_m,pose_z_m,pose_qx,pose_qy,pose_qz,pose_qw,wheel_l_rad,"
    "wheel_r_rad"
).split(",")

NO_ROTOR = {"motors.rotor_inertia": 0.0}

# (robot, controller, test, latency s, robot overrides) -> sha256 of the pinned columns
CASES = {
    "desk-mite": ("desk-mite", "cascade", None, 0.0, {}),
    "desk-mite-latency": ("desk-mite", "cascade", None, 0.01, {}),
    "shelf-runner": ("shelf-runner", "cascade", None, 0.0, {}),
    "shelf-runner-latency": ("shelf-runner", "cascade", None, 0.005, {}),
    "tall-mast": ("tall-mast", "cascade", None, 0.0, {}),
    "tall-mast-latency": ("tall-mast", "cascade", None, 0.015, {}),
    "shelf-runner-imu-latency": ("shelf-runner", "cascade", None, 0.0, {"imu.latency": 0.002}),
    "desk-mite-slow-imu": ("desk-mite", "cascade", None, 0.0, {"imu.rate": 250.0}),
    "shelf-runner-push": ("shelf-runner", "cascade", "push", 0.0, {}),
    "desk-mite-push-latency": ("desk-mite", "cascade", "push", 0.01, {}),
    "shelf-runner-payload": ("shelf-runner", "cascade", "payload", 0.0, {}),
    "desk-mite-sensor-fault": ("desk-mite", "pid_tilt", "sensor-fault", 0.0, {}),
    "tall-mast-bumps": ("tall-mast", "cascade", "bumps", 0.005, {}),
    "tall-mast-drive": ("tall-mast", "cascade", "drive", 0.0, {}),
    # no reflected rotor inertia: these stay when the rotor coupling changes
    "desk-mite-no-rotor": ("desk-mite", "cascade", None, 0.0, NO_ROTOR),
    "shelf-runner-no-rotor-push": ("shelf-runner", "cascade", "push", 0.005, NO_ROTOR),
    "tall-mast-no-rotor-latency": ("tall-mast", "cascade", None, 0.01, NO_ROTOR),
}

PINS = {
    "desk-mite": "dfd44cf2ada0b44a45801f0d66e48378455dbf4ea4ad49516514282fbee44a7d",
    "desk-mite-latency": "f0cec1c926329ce31e6e844be2701835937e4939a37330887ca9b6c398dbd816",
    "desk-mite-no-rotor": "7ff14a6c8a114c8ef81ee610579f0a726b037df1f434c17d5346cd19edec8b83",
    "desk-mite-push-latency": "e5fe1c6e173a1b8342e27cef6e2bf1823dc71acddf0409ba6c305a3e0c67cf57",
    "desk-mite-sensor-fault": "ee0b6dfdd87088d9d2d2e97129685e5321de3bf3f8dcf7ce5ca6a923d5b0095b",
    "desk-mite-slow-imu": "d584c227e50d3c71abad532026330370f2c5b2ae7690f310ce5bf618c88189b1",
    "shelf-runner": "76b2ec7729be49135b41850b3660e3cf9f751f2f14771c7a0759cb16762987e1",
    "shelf-runner-imu-latency": "30d58a10fcb93e3007ce643785e0db0439e48406c68d108802e1c362dddab57b",
    "shelf-runner-latency": "c0c90f05b798298cf3274b53db2977f8e7d59c725c167822e1c305940cad6233",
    "shelf-runner-no-rotor-push": "763797f7c4c18d6da25bc5d52c9e6a1591684fbc5eb0797975dbba582bd0c8be",  # noqa: E501
    "shelf-runner-payload": "5addb48952a262f56c44bc7f0778b0d2907dc0fad2f8dfffac7fcfbad14295f2",
    "shelf-runner-push": "602fe878d24f0edc9048761a563aafd3e0543c7617d298512b79da4ebeebeeae",
    "tall-mast": "ff4627010f644d87c0b384ab860431a5aa3cd3031a3d88aa2dd499cbfa3240c7",
    "tall-mast-bumps": "d478b11608f552835ace330af0c64acd2d36d091a19719ee15a618d5e9cf669e",
    "tall-mast-drive": "3dfbc3486d60bd6ccc76cd9c38e45b5bdc0668a6141b973b599d4243d2951f9a",
    "tall-mast-latency": "6bab280622a94f34c959f6debd1c5ffa9c0cfdc3cc8b10df34e90a7e8cae25a3",
    "tall-mast-no-rotor-latency": "9c4f4cfbe48f873861eb019c2bd136c6209a6b33421a48eeae1c407cd6277a8a",  # noqa: E501
}



def pinned_trace_hash(folder: Path) -> str:
    """SHA-256 of the pinned columns (and log channels) of a run's trace, as written."""
    text = (folder / "trace.csv").read_text(encoding="utf-8")
    rows = list(csv.reader(io.StringIO(text)))
    header = rows[0]
    keep = [header.index(c) for c in PINNED_COLUMNS]
    keep += [i for i, c in enumerate(header) if c.startswith("log.")]
    out = io.StringIO()
    for row in rows:
        out.write(",".join(row[i] for i in keep) + "\n")
    return hashlib.sha256(out.getvalue().encode()).hexdigest()


def run_case(name: str, folder: Path) -> str:
    robot, controller, test, latency, overrides = CASES[name]
    spec = load_robot(PINNED / f"{robot}.yaml", overrides)
    # tests run long enough for their first two disturbances
    settings = RunSettings(controller=str(PINNED / f"{controller}.py"),
                           duration=5.5 if test else 2.0,
                           tilt=0.05, seed=7, latency=latency)
    run_once(spec, settings, test=test, folder=folder, duration_given=True, plots=False)
    return pinned_trace_hash(folder)


@pytest.mark.parametrize("name", sorted(CASES))
def test_trace_bytes_are_pinned(name: str, tmp_path: Path) -> None:
    """Robot files without the new keys give the same trace bytes as before the rebuild."""
    assert run_case(name, tmp_path) == PINS[name], f"trace of {name} changed"


if __name__ == "__main__":  # print the pins (only when taking them anew, on purpose)
    import tempfile

    for case in sorted(CASES):
        with tempfile.TemporaryDirectory() as tmp:
            print(f'    "{case}": "{run_case(case, Path(tmp))}",')
