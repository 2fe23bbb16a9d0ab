"""`vservo handeye collect --live` against the simulated cell over DDS (isolated): a sample
taken at rest is the simulator's true target pose; the collector publishes nothing.

Outside check: the simulator's ground truth (true hand-eye and target pose) against OpenCV's
IPPE PnP (Collins & Bartoli 2014) on the perceived image.
"""
from __future__ import annotations

import types

import numpy as np
from sim_helpers import config_scenario, start_sim, stop_sim

from vservo_node.calib import handeye as he


def test_live_sample_at_rest_is_the_true_target_pose(ros_node):
    sc = config_scenario()
    proc = start_sim(ros_node)
    try:
        from vservo_node.ros.handeye_client import collect_live

        args = types.SimpleNamespace(namespace="", urdf=None, base_frame=sc.base_frame,
                                     tool_frame=sc.tool_frame)
        printed = []
        samples, _arm, _camera = collect_live(args, sc.target, lines=iter(["\n", "q\n"]),
                                            out=printed.append)
    finally:
        stop_sim(proc)
    assert len(samples) == 1, printed
    s = samples[0]
    T_true = np.linalg.inv(sc.arm_model("true").camera_pose(np.asarray(s.q))) @ sc.T_base_target
    mm, deg = he.pose_difference(T_true, s.T_camera_target)
    assert mm < 1.0 and deg < 0.2, (mm, deg)


def test_the_live_collector_cannot_command_anything():
    """It creates no publisher, service client or action client (it never moves the arm)."""
    import ast
    from pathlib import Path

    import vservo_node.ros.handeye_client as client

    calls = {node.func.attr for node in ast.walk(ast.parse(Path(client.__file__).read_text()))
             if isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute)}
    assert "create_subscription" in calls
    assert not calls & {"create_publisher", "create_client", "ActionClient"}
