"""The bag `vservo demo` records: the real simulated cell, controller and recorder processes over
DDS (vservo_node/ros/demo_run.py), the bag read back by rosbags' AnyReader (an independent
reader of the rosbag2/MCAP formats). The recorder is started late on purpose, as happens on a
loaded machine (its imports take seconds): the demo must wait for it before starting the run."""
import argparse
import json
import sys

import pytest
from rosbags.highlevel import AnyReader

from vservo_node import interface as itf
from vservo_node.params import load_params_file
from vservo_node.paths import config_dir
from vservo_node.record.bag import default_typestore
from vservo_node.ros import demo_run, harness

SCENARIO = "tray_twist"
# Status records are stamped with image times (30 Hz in the simulated cell) or the node time of
# a state change, so the recorded span and the controller's run time differ by a few frames at
# most; a bag that joined the run late misses seconds (common practice, no source).
SPAN_TOLERANCE_S = 0.25
RECORDER_DELAY_S = 3.0   # longer than the cell takes to accept enable_motion and start


def delayed_recorder(start_module):
    """``harness.start_module`` that starts the recorder RECORDER_DELAY_S late."""
    def start(module, args=(), ros_args=(), env=None, name=None):
        if module != "vservo_node.ros.recorder_node":
            return start_module(module, args, ros_args, env, name)
        command = [sys.executable, "-m", module, *args, "--ros-args", *ros_args]
        return harness.NodeProcess(["sh", "-c", 'sleep "$0" && exec "$@"',
                                    str(RECORDER_DELAY_S), *command], name or module, env)
    return start


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """One `vservo demo` run with a late recorder: (runs folder, the demo's own folder, the
    recorded bag)."""
    harness.require_isolation()
    runs = tmp_path_factory.mktemp("demo_runs")
    args = argparse.Namespace(scenario=SCENARIO, timeout=60.0, runs_dir=str(runs),
                              json=str(runs / "summary.json"), core=False)
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(harness, "start_module", delayed_recorder(harness.start_module))
        demo_run.run_cell_demo(args)
    (own,) = runs.glob(f"*_{SCENARIO}_demo")
    bags = [p for p in runs.iterdir() if p.is_dir() and p != own]
    assert len(bags) == 1, f"expected one bag in {runs}: {bags}"
    return runs, own, bags[0]


def recorded_status(bag):
    """The status records of the bag, in log order."""
    with AnyReader([bag], default_typestore=default_typestore()) as reader:
        conns = [c for c in reader.connections if c.topic == "/" + itf.TOPIC_STATUS]
        return [json.loads(reader.deserialize(raw, c.msgtype).data)
                for c, _, raw in reader.messages(connections=conns)]


def test_bag_holds_the_controller_parameters(demo):
    """params.yaml holds what the controller was started with (config/vservo_sim.yaml with the
    demo's overrides on top), and the report used them."""
    _, own, bag = demo
    started_with = load_params_file(config_dir() / "vservo_sim.yaml")
    started_with.update(load_params_file(own / "controller_overrides.yaml"))
    recorded = load_params_file(bag / "params.yaml")
    assert {k: recorded.get(k) for k in started_with} == pytest.approx(started_with)
    metrics = json.loads((bag / "report" / "metrics.json").read_text())
    assert metrics["tolerance_px"] == pytest.approx(started_with["control.tolerance_px"])
    assert metrics["tool_speed_limit_m_s"] is not None


def test_bag_holds_the_whole_run_from_its_first_status(demo):
    """The bag starts with the run's first status record (servoing) and spans the run time the
    controller reported."""
    _, _, bag = demo
    result = json.loads((bag / "result.json").read_text())
    records = recorded_status(bag)
    assert records[0]["state"] == "servoing" and records[0]["run_id"] == result["run_id"]
    end = next(r for r in records if r["state"] in ("converged", "halted"))
    assert end["t"] - records[0]["t"] == pytest.approx(result["time_s"], abs=SPAN_TOLERANCE_S)


def test_bag_keeps_the_taught_reference_with_its_image_and_joints(demo):
    """The demo teaches on the simulated arm at the scenario's taught joints; the recorder
    copies the reference and its image into the bag, and the report shows that view."""
    import numpy as np

    from vservo_node.sim import load_scenario
    from vservo_node.vision.reference import load_reference

    _, own, bag = demo
    (copy,) = (bag / "reference").glob("*.yaml")
    scenario = load_scenario(SCENARIO)
    reference = load_reference(copy, scenario.target)
    assert reference.notes == () and reference.image.shape == (480, 640, 3)
    assert (copy.parent / copy.with_suffix(".png").name).is_file()
    names = scenario.arm_model("true").joint_names
    np.testing.assert_array_equal(reference.joints_for(names), scenario.q_taught)
    report = (bag / "report" / "report.html").read_text()
    assert "the taught view from the reference copied into the record" in report
