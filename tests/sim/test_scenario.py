"""Scenario files: the shipped ones load; malformed ones are refused with a message naming the
file entry that is wrong and what was expected (DEVELOPERS.md, safety rules; common practice,
no source)."""
from __future__ import annotations

import copy
import functools

import numpy as np
import pytest
import yaml

from vservo_node import paths
from vservo_node.sim.scenario import ScenarioError, load_scenario, scenario_from_dict

SHIPPED = sorted(p.stem for p in (paths.config_dir() / "scenarios").glob("*.yaml"))


@functools.cache
def _base():
    return yaml.safe_load(paths.shipped("scenarios", "tray_offset").read_text())


def base():
    return copy.deepcopy(_base())


def test_every_brief_scenario_is_shipped():
    assert {"tray_twist", "tray_offset", "tray_combined", "tray_tags_offset",
            "tray_poster_offset", "vs6_tray_offset"} <= set(SHIPPED)


@pytest.mark.parametrize("name", SHIPPED)
def test_shipped_scenarios_load(name):
    scenario = load_scenario(name)
    assert scenario.name == name
    arm = scenario.arm_model()
    for q in (scenario.q_home, scenario.q_taught, scenario.q_start):
        assert q.shape == (arm.n,)
        assert np.all(q >= arm.lower) and np.all(q <= arm.upper)
    assert "invented" in paths.shipped("scenarios", name).read_text().lower()


def test_belief_perturbations_are_carried():
    spec = base()
    spec["controller_belief"] = {"hand_eye_error": {"translation": [0.01, 0, 0]},
                                 "depth_scale": 1.2}
    scenario = scenario_from_dict(spec)
    offset = np.linalg.inv(scenario.T_tool_camera_true) @ scenario.T_tool_camera_belief
    assert np.allclose(offset[:3, 3], [0.01, 0, 0]) and np.allclose(offset[:3, :3], np.eye(3))
    assert scenario.depth_scale_belief == 1.2
    assert np.allclose(scenario.arm_model("belief").T_tool_camera, scenario.T_tool_camera_belief)


def test_joint_poses_are_accepted():
    spec = base()
    names = load_scenario("tray_offset").joint_names
    spec["start"] = {"joints": {n: v for n, v in zip(names, [0.5, 0.5, -0.6, 1.3, -1.4, -1.4,
                                                             1.5])}}
    assert np.allclose(scenario_from_dict(spec).q_start, [0.5, 0.5, -0.6, 1.3, -1.4, -1.4, 1.5])


def _set(spec, dotted, value):
    keys = dotted.split(".")
    node = spec
    for key in keys[:-1]:
        node = node[key]
    if value is _DELETE:
        del node[keys[-1]]
    else:
        node[keys[-1]] = value


_DELETE = object()

MALFORMED = [
    ("camera", _DELETE, r"top level: missing key\(s\) \['camera'\]"),
    ("colour", "red", r"top level: unknown key\(s\) \['colour'\]"),
    ("format", "vservo_scenario/9", r"format: 'vservo_scenario/9' is not"),
    ("camera.intrinsics.fx", -615.0, r"camera: .*focal lengths"),
    ("camera.intrinsics.fy", "612", r"camera.intrinsics.fy: expected a number"),
    ("camera.width", 640.5, r"camera.width: expected a positive integer"),
    ("camera.d", [0.1, 0.2], r"camera: distortion model 'plumb_bob' takes 5 coefficients"),
    ("camera.fps", 0, r"camera.fps: must be > 0"),
    ("robot.urdf", "robots/nowhere.urdf", r"robot.urdf: file not found"),
    ("robot.tool_frame", "flange_of_nothing", r"robot: tool frame 'flange_of_nothing'"),
    ("target.file", "targets/nowhere.yaml", r"target.file: file not found"),
    ("target.pose.xyz", [0.5, 0.0], r"target.pose.xyz: expected a list of 3 numbers"),
    ("target.hide", [["dot", 42]], r"target.hide\[0\]: target 'tray_dots' has no dot 42"),
    ("target.hide", [["tag", 3]], r"target.hide\[0\]: a dots target has no tag features"),
    ("taught", {"above_target": {"distance": 3.0}},
     r"taught.above_target: camera pose unreachable"),
    ("taught", {"above_target": {"distance": 0.3}, "joints": {}},
     r"taught: give exactly one of"),
    ("taught.above_target.distance", -0.3, r"taught.above_target.distance: must be > 0"),
    ("start", {"joints": {"vs7_j1": 0.1}}, r"start.joints: positions missing"),
    ("start", {"joints": {"vs7_j1": 9.0, "vs7_j2": 0, "vs7_j3": 0, "vs7_j4": 0, "vs7_j5": 0,
                          "vs7_j6": 0, "vs7_j7": 0}},
     r"start.joints: outside the URDF joint limits \(rad\): vs7_j1=9 not in \[-2.8, 2.8\]"),
    ("start.offset.tilt_deg", [10.0], r"start.offset.tilt_deg: expected a list of 2 numbers"),
    ("arm.velocity_lag_s", -0.1, r"arm: velocity_lag_s must be >= 0"),
    ("arm.lag", 0.1, r"arm: unknown key\(s\) \['lag'\]"),
    ("image.gain", 0.0, r"image: gain must be > 0"),
    ("image.occlusions", [{"rect_px": [100, 100, 50, 200]}],
     r"image.occlusions\[0\].rect_px: expected \[x0, y0, x1, y1\] with x1 > x0"),
    ("controller_belief", {"depth_scale": 0}, r"controller_belief.depth_scale: must be > 0"),
    ("seed", -1, r"seed: expected a non-negative integer"),
]


@pytest.mark.parametrize("entry, value, message", MALFORMED,
                         ids=[f"{e}={v!r}"[:60] for e, v, _ in MALFORMED])
def test_malformed_scenarios_are_refused_with_the_entry_named(entry, value, message):
    spec = base()
    _set(spec, entry, value)
    with pytest.raises(ScenarioError, match=message):
        scenario_from_dict(spec)


def test_invalid_yaml_and_unknown_names_are_refused(tmp_path):
    bad = tmp_path / "broken.yaml"
    bad.write_text("name: [unclosed\n")
    with pytest.raises(ScenarioError, match="not valid YAML"):
        load_scenario(bad)
    with pytest.raises(FileNotFoundError, match="no scenarios entry named 'nowhere'"):
        load_scenario("nowhere")


def test_controller_entries_are_carried_and_checked():
    """The optional ``controller`` entry: parameter names of the schema with valid values;
    anything else is refused naming the entry."""
    spec = base()
    spec["controller"] = {"control.scheme": "decoupled", "limits.max_rotation_deg": 200}
    assert scenario_from_dict(spec).controller == {"control.scheme": "decoupled",
                                                   "limits.max_rotation_deg": 200.0}
    assert scenario_from_dict(base()).controller == {}
    for entries, fragment in (({"control.schem": "decoupled"}, "controller: control.schem: "
                                                              "unknown parameter"),
                              ({"control.scheme": "moments"}, "not one of"),
                              ({"limits.max_rotation_deg": 400.0}, "outside"),
                              (["control.scheme"], "expected a mapping")):
        spec["controller"] = entries
        with pytest.raises(ScenarioError, match=fragment):
            scenario_from_dict(spec)
