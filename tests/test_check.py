"""`vservo check`: ROS's own parameters pass, YAML mistakes are named by line and column with
no traceback, and any typo gets the nearest parameter name."""
from __future__ import annotations

import re

import pytest
import yaml

from vservo_node import cli, param_names, params


def _write(tmp_path, values: dict, name="p.yaml"):
    path = tmp_path / name
    path.write_text(yaml.safe_dump({"/vservo": {"ros__parameters": values}}))
    return path


def test_the_recorders_params_file_checks_clean(tmp_path, capsys):
    """The recorder writes every parameter the node reports through ListParameters, ROS's own
    included (use_sim_time and start_type_description_service were in a demo run's
    params.yaml); qos_overrides.* are ROS's too."""
    values = {**params.defaults(), "limits.joint_acceleration": [3.0], "use_sim_time": False,
              "start_type_description_service": True,
              "qos_overrides./joint_states.subscription.depth": 5}
    assert cli.main(["check", str(_write(tmp_path, values))]) == 0
    out = capsys.readouterr().out
    assert "note: 3 of ROS's own parameters accepted" in out and "ok:" in out


@pytest.mark.parametrize("typo, meant", [
    ("control.tolerence_px", "control.tolerance_px"),
    ("control.gain_nera", "control.gain_near"),
    ("gain_near", "control.gain_near"),
    ("contrl.gain_far", "control.gain_far"),
    ("limits.tool_linear_sped", "limits.tool_linear_speed"),
    ("io.output_rate", "io.output_rate_hz"),
])
def test_a_typo_gets_the_nearest_name(tmp_path, capsys, typo, meant):
    path = _write(tmp_path, {"limits.joint_acceleration": [3.0], typo: 1.0})
    assert cli.main(["check", str(path)]) == 1
    assert f"error: {typo}: unknown parameter (did you mean {meant}?)" in capsys.readouterr().out
    assert param_names.nearest(typo) == meant


def test_nothing_alike_gets_no_suggestion():
    assert param_names.nearest("frobnicate") is None


def test_a_yaml_mistake_is_named_by_line_and_column_without_a_traceback(tmp_path, capsys):
    text = ("vservo:\n"
            "  ros__parameters:\n"
            "    control:\n"
            "      gain_near: [1.0, 2.0\n"        # unclosed list ...
            "    limits: {a: 1}\n")               # ... found out here: line 5
    path = tmp_path / "bad.yaml"
    path.write_text(text)
    assert cli.main(["check", str(path)]) == 1
    captured = capsys.readouterr()
    err = captured.err
    assert "Traceback" not in err + captured.out and err.count("\n") == 1
    # file, line 5 and the column of PyYAML's own mark, 1-based as editors count (as
    # file:line:column, or spelled out by the YAML loaders' own error)
    try:
        yaml.safe_load(text)
    except yaml.MarkedYAMLError as exc:
        column = exc.problem_mark.column + 1
    assert str(path) in err
    assert f":5:{column}:" in err or (re.search(r"line 5\b", err)
                                       and re.search(rf"column {column}\b", err)), err


def test_a_missing_file_is_one_line(tmp_path, capsys):
    assert cli.main(["check", str(tmp_path / "none.yaml")]) == 1
    err = capsys.readouterr().err
    assert err.startswith("error:") and err.count("\n") == 1
