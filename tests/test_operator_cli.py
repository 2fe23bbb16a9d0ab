"""The operator commands' parsing and printed lines, without a ROS graph (the commands over DDS:
tests/ros/test_operator_commands.py)."""
import math
import time

import pytest

from vservo_node import cli, interface
from vservo_node.commands import operator

COMMANDS = ("teach", "enable", "disable", "start", "stop", "status", "watch")


@pytest.mark.parametrize("name", COMMANDS)
def test_every_command_documents_its_exit_codes(name, capsys):
    with pytest.raises(SystemExit) as done:
        cli.main([name, "--help"])
    assert done.value.code == 0
    text = capsys.readouterr().out
    for code in (operator.EXIT_OK, operator.EXIT_REFUSED, operator.EXIT_TIMEOUT,
                 operator.EXIT_INTERRUPTED):
        assert f"\n  {code} " in text, f"vservo {name} --help does not explain exit {code}"
    assert "--namespace" in text and "--node" in text and "--timeout" in text


@pytest.mark.parametrize("namespace,node,expected", [
    (None, "vservo", ("/", "vservo")),
    ("cell1", "vservo", ("/cell1", "vservo")),
    ("/cell1/", "arm_servo", ("/cell1", "arm_servo")),
    (None, "/cell1/vservo", ("/cell1", "vservo")),
    ("/cell1", "/cell1/vservo", ("/cell1", "vservo")),
    (None, "/vservo", ("/", "vservo")),
    (None, "/a/b/vservo", ("/a/b", "vservo")),
])
def test_controller_target(namespace, node, expected):
    assert operator.controller_target(namespace, node) == expected


def test_controller_target_refuses_a_contradiction():
    with pytest.raises(ValueError, match="lies in namespace /a, but --namespace says /b"):
        operator.controller_target("/b", "/a/vservo")


def test_contradiction_is_a_usage_error_before_any_ros(capsys):
    assert cli.main(["stop", "--node", "/a/vservo", "--namespace", "/b"]) == operator.EXIT_USAGE
    assert "give one of them" in capsys.readouterr().err


def test_status_line_has_every_field_and_dashes_for_missing():
    wall = time.mktime((2026, 1, 2, 3, 4, 5, 0, 0, -1)) + 0.25
    line = operator.status_line({"state": "halted", "reason": "image_stale", "run_id": "r-7",
                                 "rms_px": 12.345, "n_matched": 4}, wall)
    assert line == ("03:04:05.250 state=halted reason=image_stale run=r-7 rms_px=12.35 "
                    "matched=4")
    assert operator.status_line({"state": "armed", "rms_px": None, "reason": ""}, wall) == \
        "03:04:05.250 state=armed reason=- run=- rms_px=- matched=-"
    assert "rms_px=-" in operator.status_line({"rms_px": math.nan}, wall)
    assert operator.status_line({"state": "halted", "reason": "image_stale",
                                 "detail": "no image for 0.41 s"}, wall).endswith(
        "matched=- detail=no image for 0.41 s")


def test_result_line_in_words():
    converged = {"run_id": "r1", "converged": True, "reason": "", "time_s": 6.4,
                 "final_rms_px": 0.0612, "final_pose_error_mm": 0.08,
                 "final_pose_error_deg": 0.014}
    assert operator.result_line(converged) == (
        "converged after 6.40 s, final RMS error 0.061 px, pose error 0.080 mm 0.014 deg "
        "(simulator truth) (run r1)")
    halted = {"run_id": "r2", "converged": False, "reason": "image_stale", "time_s": 1.0,
              "final_rms_px": None, "final_pose_error_mm": None, "final_pose_error_deg": None}
    assert operator.result_line(halted) == ("halted: image_stale (no fresh image) after 1.00 s, "
                                            "final RMS error - px (run r2)")
    halted["detail"] = "no image used by the servo for 0.40 s"
    assert operator.result_line(halted).endswith(
        "(run r2)\n  detail: no image used by the servo for 0.40 s")


def test_watch_line_marks_stale_status():
    status = {"state": "servoing", "rms_px": 3.5, "n_matched": 5, "gain": 0.8,
              "speed_scale": 0.5, "limits_acted": ["tool_speed"], "run_id": "r3",
              "reason": ""}
    fresh = operator.watch_line(status, 0.1)
    assert fresh.startswith("servoing  rms     3.50 px  matched   5  gain 0.80/s  scale 0.50 "
                            " limits tool_speed")
    assert "no status" not in fresh and fresh.endswith("run r3")
    assert operator.watch_line(status, 2.5).endswith("(no status for 2.5 s)")


def test_started_run_id():
    assert operator.started_run_id("run 20260102-030405-1 started") == "20260102-030405-1"
    assert operator.started_run_id("motion enabled") is None


def test_sim_service_names_are_relative():
    for name in (interface.SRV_SIM_GO_TO_TAUGHT, interface.SRV_SIM_GO_TO_START):
        assert not name.startswith(("/", "~"))


def test_bring_up_chapter_names_every_topic_and_service():
    """The README's tables of the real-arm chapter keep up with vservo_node/interface.py
    (the recorder's own topics and the sim's target truth are not the controller's)."""
    from pathlib import Path
    text = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    chapter = text.split("## Bringing up a real arm", 1)[1].split("\n## ", 1)[0]
    skip = {"TOPIC_LAST_BAG", "TOPIC_RECORDER_READY", "TOPIC_SIM_TARGET_POSE_TRUTH"}
    names = {k: v for k, v in vars(interface).items()
             if k.startswith(("TOPIC_", "SRV_")) and k not in skip}
    missing = [f"{k} = {v!r}" for k, v in names.items() if f"`{v}`" not in chapter]
    assert not missing, "not in README 'Bringing up a real arm': " + ", ".join(missing)
