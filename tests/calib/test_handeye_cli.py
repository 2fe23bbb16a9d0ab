"""`vservo handeye collect|solve|check` and `vservo delay` as a user runs them (headless
simulated cell): the printed figures and the written files.

Outside checks: the scenario's true hand-eye (the simulator's ground truth), the written
parameter snippet read back through the parameter schema, the URDF joint through the URDF
origin convention (frames.transform_from_xyz_rpy), the drives' configured delay.
"""
from __future__ import annotations

import re
import xml.etree.ElementTree as ET

import pytest

from vservo_node import cli, params
from vservo_node.calib import handeye as he
from vservo_node.control import frames
from vservo_node.sim import load_scenario


def test_collect_then_solve_writes_the_true_hand_eye(tmp_path, capsys):
    samples = tmp_path / "samples.yaml"
    assert cli.main(["handeye", "collect", "--scenario", "tray_offset", "--views", "8",
                     "--out", str(samples)]) == 0
    assert "8 samples" in capsys.readouterr().out
    out_params, out_urdf = tmp_path / "he.yaml", tmp_path / "joint.urdf"
    assert cli.main(["handeye", "solve", str(samples), "--params-out", str(out_params),
                     "--urdf-out", str(out_urdf)]) == 0
    printed = capsys.readouterr().out
    for method in (*he.HAND_EYE_METHODS, *he.ROBOT_WORLD_METHODS, he.LEAST_SQUARES):
        assert method in printed
    truth = load_scenario("tray_offset").T_tool_camera_true
    values = params.load_params_file(out_params)["robot.hand_eye"]
    mm, deg = he.pose_difference(truth, frames.transform_from_xyz_quat(values[:3], values[3:]))
    assert mm < 0.5 and deg < 0.05
    origin = ET.fromstring(out_urdf.read_text()).find("origin")
    T = frames.transform_from_xyz_rpy([float(v) for v in origin.get("xyz").split()],
                                      [float(v) for v in origin.get("rpy").split()])
    assert he.pose_difference(truth, T)[0] < 0.5


def test_solve_refuses_a_bad_file_in_words(tmp_path, capsys):
    bad = tmp_path / "bad.yaml"
    bad.write_text("format: something_else\n")
    assert cli.main(["handeye", "solve", str(bad)]) == 1
    assert "expected format vservo_handeye_samples/1" in capsys.readouterr().err


@pytest.mark.parametrize("command", [["handeye", "check"], ["delay"]])
def test_check_and_delay_on_a_headless_run(command, capsys):
    args = [*command, "--scenario", "tray_offset"]
    if command[0] == "handeye":
        args += ["--belief-error-deg", "12", "-16", "0", "--sensing", "projected"]
    assert cli.main(args) == 0
    out = capsys.readouterr().out
    if command[0] == "handeye":
        deg = float(re.search(r"rotation error ([0-9.]+)", out).group(1))
        assert abs(deg - 20.0) < 1.5 and "likely cause" in out
    else:
        ms = float(re.search(r"command -> image motion: ([0-9.]+) ms", out).group(1))
        assert abs(ms - 24.0) < 10.0 and "control.loop_delay_s" in out
