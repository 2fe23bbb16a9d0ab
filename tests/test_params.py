"""The parameter schema: validation, live-update rules, the offline check and the README table."""
import textwrap

import pytest

from vservo_node import params
from vservo_node.cli import main


def write(tmp_path, body):
    path = tmp_path / "p.yaml"
    path.write_text(textwrap.dedent(body))
    return path


def test_defaults_are_valid_once_the_required_acceleration_is_given():
    assert not params.validate({}).ok          # joint acceleration has no safe default
    result = params.validate({"limits.joint_acceleration": [2.0]})
    assert result.ok, result.errors


@pytest.mark.parametrize("name,value,fragment", [
    ("control.gain_near", -1.0, "outside"),
    ("control.interaction_estimate", "mean", "not one of"),
    ("limits.tool_linear_speed", 0.3, "outside"),          # above 0.25 m/s (ISO 10218-1 ceiling)
    ("robot.hand_eye", [0.0, 0.0, 0.1], "expected 0 or 7"),
    ("limits.joint_acceleration", [2.0, -1.0], "outside [0.001, 100.0]"),
    ("control.min_features", 2.5, "not an integer"),
    ("control.scheme", "moments", "not one of"),
])
def test_invalid_values_are_refused_with_the_reason(name, value, fragment):
    result = params.validate({"limits.joint_acceleration": [2.0], name: value})
    assert not result.ok and any(fragment in e for e in result.errors), result.errors


def test_decoupled_scheme_needs_four_points():
    """Three points leave PnP of a calibrated camera up to four solutions (Fischler & Bolles
    1981, "Random sample consensus", CACM 24(6), from memory), and OpenCV's IPPE and SQPnP
    want 4 or more here, so control.scheme decoupled refuses control.min_features 3."""
    result = params.validate({"limits.joint_acceleration": [2.0], "control.scheme": "decoupled",
                              "control.min_features": 3})
    assert any("needs 4 points" in e and "min_features = 3" in e for e in result.errors)
    assert params.validate({"limits.joint_acceleration": [2.0],
                            "control.scheme": "decoupled"}).ok


def test_unknown_name_suggests_the_known_one():
    result = params.validate({"limits.joint_acceleration": [2.0], "gain_far": 0.2})
    assert any("did you mean control.gain_far" in e for e in result.errors)


def test_delay_bound_is_enforced():
    # 0.3 bound (common practice, no source): 4 1/s x (0.05 + 1/30) s = 0.333 >= 0.3
    result = params.validate({"limits.joint_acceleration": [2.0], "control.gain_near": 4.0,
                              "control.loop_delay_s": 0.05, "io.camera_rate_hz": 30.0})
    assert any("loop delay" in e for e in result.errors)
    ok = params.validate({"limits.joint_acceleration": [2.0], "control.gain_near": 3.0,
                          "control.loop_delay_s": 0.05, "io.camera_rate_hz": 30.0})
    assert ok.ok   # 3 x 0.0833 = 0.25


def test_limits_only_tighten_while_enabled():
    assert params.check_change("limits.tool_linear_speed", 0.10, 0.05, True) is None
    assert "only be lowered" in params.check_change("limits.tool_linear_speed", 0.10, 0.2, True)
    assert params.check_change("limits.tool_linear_speed", 0.10, 0.2, False) is None
    assert "only be raised" in params.check_change("limits.min_camera_distance_m", 0.1, 0.05, True)
    assert "outside" in params.check_change("control.tolerance_px", 0.5, -1.0, False)


def test_check_command_on_files(tmp_path, capsys):
    good = write(tmp_path, """
        vservo:
          ros__parameters:
            limits:
              joint_acceleration: [2.0]
            control:
              gain_near: 0.8
    """)
    assert main(["check", str(good)]) == 0
    assert "ok:" in capsys.readouterr().out
    bad = write(tmp_path, """
        /**:
          ros__parameters:
            control: {gain_near: 20.0}
    """)
    assert main(["check", str(bad)]) == 1
    out = capsys.readouterr().out
    assert "control.gain_near" in out and "limits.joint_acceleration: required" in out


@pytest.mark.parametrize("key", ["/**/vservo", "/**", "vservo", "/vservo", "/cell1/vservo",
                                 "/cell1/*"])
def test_file_keys_that_reach_a_node_named_vservo(tmp_path, key, capsys):
    """Every key form rcl applies to a node named vservo in some namespace is read (and
    `vservo check` accepts it); the values are the file's."""
    path = write(tmp_path, f"""
        {key}:
          ros__parameters:
            limits: {{joint_acceleration: [2.0], joint_velocity_scale: 0.2}}
            io: {{require_permit: true}}
    """)
    values = params.load_params_file(path)
    assert values == {"limits.joint_acceleration": [2.0], "limits.joint_velocity_scale": 0.2,
                      "io.require_permit": True}
    assert main(["check", str(path)]) == 0, capsys.readouterr()


def test_file_keys_for_other_nodes_are_not_read(tmp_path):
    path = write(tmp_path, """
        /**/vservo_sim:
          ros__parameters: {scenario: tray_twist}
        /cell1/other:
          ros__parameters: {scenario: tray_twist}
    """)
    with pytest.raises(ValueError, match="no ros__parameters for node 'vservo'"):
        params.load_params_file(path)


def test_full_node_name_selects_its_namespace_in_file_order(tmp_path):
    """A later matching section overrides an earlier one, whatever its key (what rclpy 9.1.2
    does with such a file, measured)."""
    path = write(tmp_path, """
        /cell1/vservo:
          ros__parameters: {control: {gain_near: 0.5}}
        /**/vservo:
          ros__parameters: {control: {gain_near: 0.9, gain_far: 0.3}}
        /cell2/vservo:
          ros__parameters: {control: {gain_near: 0.7}}
    """)
    assert params.load_params_file(path, "/cell1/vservo") == {"control.gain_near": 0.9,
                                                              "control.gain_far": 0.3}
    assert params.load_params_file(path, "/cell2/vservo")["control.gain_near"] == 0.7
    assert params.load_params_file(path, "/cell3/vservo")["control.gain_near"] == 0.9
    with pytest.raises(ValueError, match="several namespaces.*full name"):
        params.load_params_file(path)   # which of cell1 and cell2 is meant?


def test_readme_table_matches_the_schema():
    from pathlib import Path
    readme = (Path(__file__).resolve().parent.parent / "README.md").read_text()
    assert params.markdown_table() in readme, (
        "README parameter table is stale: regenerate it with `.venv/bin/python -c "
        "'from vservo_node import params; print(params.markdown_table())'`")


# ------------------------------------------------------------- one definition of each default
def _core_defaults():
    """(where, default, schema parameter) of every core dataclass default bound to the schema."""
    import dataclasses

    from vservo_node.control.law import DampingSchedule, GainSchedule, LawConfig
    from vservo_node.control.safety import LimitSet
    from vservo_node.perception import DepthSettings
    from vservo_node.servo_settings import ServoSettings

    def field_default(cls, name):
        return {f.name: f for f in dataclasses.fields(cls)}[name].default

    bound = [(GainSchedule, "gain_near", "control.gain_near"),
             (GainSchedule, "gain_far", "control.gain_far"),
             (GainSchedule, "half_error_px", "control.gain_half_error_px"),
             (DampingSchedule, "epsilon", "control.singular_threshold"),
             (DampingSchedule, "mu_max", "control.max_damping"),
             (LawConfig, "soft_start_tau", "control.soft_start_s"),
             (LawConfig, "null_space_gain", "control.null_space_gain"),
             (LimitSet, "velocity_scale", "limits.joint_velocity_scale"),
             (LimitSet, "tool_linear_max", "limits.tool_linear_speed"),
             (LimitSet, "camera_linear_max", "limits.camera_linear_speed"),
             (LimitSet, "angular_max", "limits.angular_speed"),
             (DepthSettings, "source", "depth.source"),
             (DepthSettings, "constant_m", "depth.constant_m")]
    out = [(f"{cls.__name__}.{name}", field_default(cls, name), param)
           for cls, name, param in bound]
    for f in dataclasses.fields(ServoSettings):
        if f.name != "depth_source":      # converted: checked below
            out.append((f"ServoSettings.{f.name}", f.default, f.metadata["param"]))
    return out


@pytest.mark.parametrize("where,value,name", _core_defaults(), ids=lambda v: str(v))
def test_every_core_default_is_the_schema_default(where, value, name):
    assert value == params.BY_NAME[name].default, (where, value, name)
    assert type(value) is params.BY_NAME[name].type, (where, type(value))


def test_default_constructed_law_and_settings_agree_with_the_schema():
    """The objects a caller gets without arguments are the schema's (the issue: GainSchedule()
    0.8 / 0.3 / 30 against 1.0 / 0.5 / 60, DampingSchedule() 0.05 against 0.003,
    LawConfig().null_space_gain 0.1 against 0.5, LimitSet.angular_max 0.5 against 0.6)."""
    from vservo_node.control.kinematics import load_robot
    from vservo_node.control.law import LawConfig
    from vservo_node.servo_settings import ServoSettings
    from vservo_node.settings import Settings, limits_for, servo_config

    assert ServoSettings().law_config() == LawConfig()
    assert ServoSettings().depth_source == "taught" == params.default("depth.source")
    every = params.defaults()
    every["limits.joint_acceleration"] = [2.0]
    arm = load_robot("vs7_bench").arm
    servo, limits = servo_config(Settings.from_values(params.validate(every).values), arm)
    assert servo == ServoSettings()
    default_limits = limits_for(arm)
    for name in ("velocity_scale", "tool_linear_max", "camera_linear_max", "angular_max"):
        assert getattr(limits, name) == getattr(default_limits, name), name


def test_every_servo_setting_is_a_schema_parameter_and_every_supervisor_entry_is_used():
    from vservo_node.servo_settings import PARAM_OF_FIELD

    assert set(PARAM_OF_FIELD.values()) <= set(params.BY_NAME)
    supervisor = {p.name for p in params.SCHEMA if p.name.startswith("supervisor.")}
    assert supervisor and supervisor <= set(PARAM_OF_FIELD.values())
    for name in supervisor:            # range, unit or a dimensionless ratio, and words
        p = params.BY_NAME[name]
        assert p.low is not None and p.high is not None and len(p.description) > 20, name


def test_servo_config_converts_the_observed_depth_sources():
    from vservo_node.control.kinematics import load_robot
    from vservo_node.settings import Settings, servo_config

    arm = load_robot("vs7_bench").arm
    for source, mode in (("constant", "constant"), ("taught", "taught"),
                         ("target_model", "observed"), ("depth_image", "observed")):
        values = {"depth.source": source, "limits.joint_acceleration": [2.0]}
        assert servo_config(Settings.from_values(values), arm)[0].depth_source == mode


def test_core_modules_import_first_in_a_fresh_interpreter():
    """control.law and control.safety read their defaults from params, which imports two
    control modules: each must still import first (no import cycle through them)."""
    import subprocess
    import sys

    for module in ("vservo_node.control.law", "vservo_node.control.safety",
                   "vservo_node.servo", "vservo_node.params"):
        subprocess.run([sys.executable, "-c", f"import {module}"], check=True)


def test_every_servo_setting_reads_its_own_parameter():
    """Wired through settings.servo_config (the one mapping): a value other than the default,
    given under the field's parameter name, arrives in exactly that field (the depth source
    through its conversion); supervisor.* included."""
    import dataclasses

    from vservo_node.control.kinematics import load_robot
    from vservo_node.servo_settings import PARAM_OF_FIELD
    from vservo_node.settings import Settings, servo_config

    arm = load_robot("vs7_bench").arm
    base = servo_config(Settings.from_values({"limits.joint_acceleration": [2.0]}), arm)[0]
    for field_name, name in PARAM_OF_FIELD.items():
        p = params.BY_NAME[name]
        if p.type is bool:
            value = not p.default
        elif p.choices:
            value = next(c for c in p.choices if c != p.default)
        elif p.type in (int, float):
            value = p.type(p.high if p.default != p.high else p.low)
        else:
            continue
        got = servo_config(Settings.from_values({name: value,
                                                 "limits.joint_acceleration": [2.0]}), arm)[0]
        changed = {f.name for f in dataclasses.fields(got)
                   if getattr(got, f.name) != getattr(base, f.name)}
        assert changed == {field_name}, (name, value, changed)
