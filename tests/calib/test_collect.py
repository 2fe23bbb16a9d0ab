"""Hand-eye samples from the simulated cell and from a bag of it (invented cell, calib_bags.py).

Outside checks: the camera pose found by PnP against the simulator's ground truth (OpenCV's
IPPE, Collins & Bartoli 2014, through pose_error.pose_from_model); the solved hand-eye against
the scenario's true one (cv2.calibrateHandEye and the SciPy least-squares solve); the bag read
through rosbags' AnyReader as written by the project's RunRecorder.
"""
from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).parent))
from datetime import UTC

import calib_bags

from vservo_node.calib import handeye as he
from vservo_node.calib import samples as cs
from vservo_node.sim import load_scenario

SCENARIO = "tray_offset"


@pytest.fixture(scope="module")
def sim_samples():
    sc = load_scenario(SCENARIO)
    samples, info = cs.samples_from_sim(sc, 10, seed=0)
    return sc, samples, info


def test_each_sample_sees_the_target_where_the_simulator_put_it(sim_samples):
    sc, samples, info = sim_samples
    assert len(samples) == 10, info["skipped"]
    arm = sc.arm_model("true")
    for s in samples:
        T_true = np.linalg.inv(arm.camera_pose(np.asarray(s.q))) @ sc.T_base_target
        mm, deg = he.pose_difference(T_true, s.T_camera_target)
        # joint-state noise 1e-5 rad and the dots' image noise: a fraction of a mm
        assert mm < 1.0 and deg < 0.2, (mm, deg)


def test_samples_from_the_simulated_cell_solve_its_true_hand_eye(sim_samples, tmp_path):
    sc, samples, _ = sim_samples
    path = cs.save_samples(tmp_path / "s.yaml", samples, sc.joint_names, camera=sc.camera)
    loaded, header = cs.load_samples(path)
    assert len(loaded) == len(samples) and header["mounting"] == "hand"
    cal = he.calibrate(loaded, "hand", header["focal_px"])
    mm, deg = he.pose_difference(sc.T_tool_camera_true, cal.best.X)
    # rendered, detected dots (image noise 2 grey levels, blur 0.5 px): measured 0.16 mm /
    # 0.012 deg with 12 views; bound with margin
    assert mm < 0.5 and deg < 0.05, (mm, deg)
    assert cal.warnings == []


def test_a_bag_gives_one_sample_per_rest_and_none_in_motion(sim_samples, tmp_path):
    sc, samples, _ = sim_samples
    qs = [np.asarray(s.q) for s in samples[:8]]
    bag = calib_bags.write_calibration_bag(tmp_path, sc, qs)
    arm = sc.arm_model("urdf")
    text = cs.urdf_from_bag(bag)
    assert text and "<robot" in text
    got, info = cs.samples_from_bag(bag, arm, sc.target)
    assert len(got) == len(qs), info
    assert info["frames"] > info["at_rest"] > len(qs)      # frames in motion were left out
    for s, q in zip(got, qs):
        assert np.abs(np.asarray(s.q) - q).max() < 1e-9
    cal = he.calibrate(got, "hand", 0.5 * (sc.camera.K[0, 0] + sc.camera.K[1, 1]))
    mm, deg = he.pose_difference(sc.T_tool_camera_true, cal.best.X)
    assert mm < 0.6 and deg < 0.06, (mm, deg)


def test_a_bag_without_images_is_refused_in_words(tmp_path):
    from datetime import datetime

    from vservo_node.record.bag import RunRecorder

    with RunRecorder(tmp_path, "empty", started=datetime(2000, 1, 1, tzinfo=UTC),
                     folder_name="empty") as rec:
        T = rec.typestore.types
        rec.write("joint_states", "sensor_msgs/msg/JointState", T["sensor_msgs/msg/JointState"](
            header=T["std_msgs/msg/Header"](stamp=T["builtin_interfaces/msg/Time"](
                sec=1, nanosec=0), frame_id=""), name=["a"], position=np.zeros(1),
            velocity=np.zeros(0), effort=np.zeros(0)), 10**9)
    with pytest.raises(ValueError, match="no camera images"):
        cs.samples_from_bag(rec.bag_dir, load_scenario(SCENARIO).arm_model("urdf"),
                            load_scenario(SCENARIO).target)
