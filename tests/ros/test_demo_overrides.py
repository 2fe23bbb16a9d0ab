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
