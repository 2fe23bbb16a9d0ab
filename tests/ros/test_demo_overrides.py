"""The demo's controller parameter file carries the scenario's own ``controller`` entries
(vservo_node/sim/scenario.py), so `vservo demo --scenario vs6_tray_turn180` runs the node with
the decoupled scheme the scenario asks for. No ROS context is started; the module imports
rclpy, hence its place here."""
from pathlib import Path

from vservo_node.params import load_params_file
from vservo_node.ros.demo_run import controller_overrides
from vservo_node.sim import load_scenario


def test_scenario_controller_entries_reach_the_node_parameters(tmp_path: Path):
    scenario = load_scenario("vs6_tray_turn180")
    path = controller_overrides(scenario, tmp_path / "ref.yaml", tmp_path,
                                extra={"control": {"gain_near": 0.9}})
    values = load_params_file(path)
    assert values["control.scheme"] == "decoupled"
    assert values["limits.max_rotation_deg"] == scenario.controller["limits.max_rotation_deg"]
    assert values["control.gain_near"] == 0.9            # the caller's extra still wins
    assert values["reference.file"] == str(tmp_path / "ref.yaml")
    plain = load_params_file(controller_overrides(load_scenario("vs6_tray_offset"),
                                                  tmp_path / "ref.yaml", tmp_path))
    assert "control.scheme" not in plain


def test_a_fixed_camera_scenario_passes_its_believed_stand_and_target(tmp_path: Path):
    # vs6_stand_combined: the controller is told the stand and the board off (controller_belief)
    import numpy as np

    from vservo_node.control.mounting import mount_from_params
    from vservo_node.params import validate

    scenario = load_scenario("vs6_stand_combined")
    values = load_params_file(controller_overrides(scenario, tmp_path / "ref.yaml", tmp_path))
    assert values["robot.camera_mount"] == "fixed" and "robot.hand_eye" not in values
    checked = validate({**values, "limits.joint_acceleration": [3.0]})
    assert checked.ok, checked.errors
    mount = mount_from_params(checked.values, scenario.arm_model("belief"))
    belief = scenario.mount("belief")
    np.testing.assert_allclose(mount.T_base_camera, belief.T_base_camera, atol=1e-12)
    np.testing.assert_allclose(mount.T_tool_target, belief.T_tool_target, atol=1e-12)
    assert not np.allclose(mount.T_base_camera, scenario.mount("true").T_base_camera)
