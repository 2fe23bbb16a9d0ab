"""The controller node's two optional inputs, in a real ROS graph: the robot model read from
the ``robot_description`` topic, and images as sensor_msgs/CompressedImage.

Processes (started together so their start-up overlaps): ``vservo_sim`` (config/sim_cell.yaml:
publishes the URDF on ``robot_description`` latched, rgb8 images, camera_info and joint
states; the arm rests without commands) and three controllers on config/vservo_sim.yaml:

- ``/vservo``: ``robot.urdf_path`` empty and no ``robot_description`` parameter, so its model
  can only come from the sim's topic;
- ``/nomodel/vservo``: the same, in a namespace where nobody publishes ``robot_description``;
- ``/cz/vservo``: ``io.compressed_image`` true, model from the URDF file, camera_info and joint
  states remapped to the sim's; its only images are PNGs this test process encodes from the
  sim's frames and relays on ``/cz/camera/image/compressed``.

What is checked, against the node's documented behaviour (module docstring of
vservo_node/ros/controller_node.py: "Robot model: the file robot.urdf_path, else the
robot_description parameter, else the robot_description topic"; "camera/image/compressed when
io.compressed_image"; enable refusals name the failing check): the topic-fed controller
teaches and enables; without a publisher enable is refused naming the missing model; the
compressed-fed controller teaches from the decoded frames and publishes features, which match
those the raw-fed controller finds in the same (static) scene, since PNG is lossless.
Run: cd /work/main && tools/isolated .venv/bin/python -m pytest \
     tests/ros/test_controller_inputs.py -q
"""
from __future__ import annotations


import cv2
import numpy as np
import pytest
from sensor_msgs.msg import CompressedImage, Image
from std_msgs.msg import Float64, Float64MultiArray

from sim_helpers import CONFIG as SIM_CONFIG
from test_controller_node import URDF, Rig, expect
from vservo_node import interface as itf
from vservo_node.paths import config_dir
from vservo_node.ros import convert, harness, qos

CONTROLLER = "vservo_node.ros.controller_node"
# image_transport's format string for a PNG of an rgb8 image (OpenCV encodes BGR order).
PNG_FORMAT = "rgb8; png compressed bgr8"


@pytest.fixture(scope="module")
def processes(tmp_path_factory):
    harness.require_isolation()
    tmp = tmp_path_factory.mktemp("controller_inputs")
    base = ["--params-file", str(config_dir() / "vservo_sim.yaml"),
            "-p", f"reference.directory:={tmp / 'references'}"]
    procs = {
        "sim": harness.start_module("vservo_node.ros.sim_node", name="vservo_sim",
                                    ros_args=["--params-file", str(SIM_CONFIG)]),
        "controller": harness.start_module(CONTROLLER, ros_args=base, name="controller"),
        "nomodel": harness.start_module(CONTROLLER, name="nomodel_controller",
                                        ros_args=[*base, "-r", "__ns:=/nomodel"]),
        "compressed": harness.start_module(CONTROLLER, name="compressed_controller", ros_args=[
            *base, "-r", "__ns:=/cz", "-p", f"robot.urdf_path:={URDF}",
            "-p", "io.compressed_image:=true",
            "-r", f"{itf.TOPIC_CAMERA_INFO}:=/{itf.TOPIC_CAMERA_INFO}",
            "-r", f"{itf.TOPIC_JOINT_STATES}:=/{itf.TOPIC_JOINT_STATES}"]),
    }
    yield procs
    for proc in procs.values():
        proc.stop()


@pytest.fixture(scope="module")
def rig(ros_node, processes):
    return Rig(ros_node, processes)


def _collect(rig, msg_type, topic):
    got = []
    rig.node.create_subscription(msg_type, topic, lambda m: got.append(m), qos.STATE)
    return got


def _wait_for_sim_images(rig) -> None:
    """Until the sim's frames flow, then long enough for the controllers to process some."""
    harness.wait_for_message(rig.node, "/" + itf.TOPIC_IMAGE, Image, qos.SENSOR_DATA, 30.0,
                             processes=rig.procs)
    rig.spin(0.5)


def _mean_of_last(msgs, n: int) -> np.ndarray:
    return np.mean([m.data for m in msgs[-n:]], axis=0)


def test_robot_model_from_the_robot_description_topic(rig, processes):
    """Model from the sim's latched topic: capture (which needs perception and a fresh image)
    and enable pass, and the log says where the model came from."""
    _wait_for_sim_images(rig)
    expect(rig.capture(), True, "loaded")
    expect(rig.enable(True), True, "motion enabled")
    rig.wait_state("armed")
    assert "robot model from the robot_description topic: 7 joints" \
        in processes["controller"].output()
    expect(rig.enable(False), True, "motion disabled")


def test_enable_refused_naming_the_missing_robot_model(rig):
    expect(rig.enable(True, prefix="/nomodel"), False,
           "robot_model: waiting for a URDF on the robot_description topic")


def test_compressed_images_are_decoded_and_matched(rig):
    """PNG frames relayed by this process: the /cz controller teaches from them and reports
    features every frame; their positions equal the raw-fed controller's within 0.2 px
    (same static scene, lossless codec; the margin covers the sim's per-frame image noise,
    ~0.07 px: config/vservo_sim.yaml, control.tolerance_px note)."""
    relay = rig.node.create_publisher(CompressedImage, "/cz/" + itf.TOPIC_IMAGE_COMPRESSED,
                                      qos.SENSOR_DATA)

    def forward(msg: Image):
        bgr = cv2.cvtColor(convert.image_to_numpy(msg), cv2.COLOR_RGB2BGR)
        ok, png = cv2.imencode(".png", bgr, [cv2.IMWRITE_PNG_COMPRESSION, 1])
        assert ok
        relay.publish(convert.compressed_image(png, PNG_FORMAT, msg.header.stamp,
                                               msg.header.frame_id))

    rig.node.create_subscription(Image, "/" + itf.TOPIC_IMAGE, forward, qos.SENSOR_DATA)
    raw_features = _collect(rig, Float64MultiArray, "/" + itf.TOPIC_FEATURES)
    features = _collect(rig, Float64MultiArray, "/cz/" + itf.TOPIC_FEATURES)
    rms = _collect(rig, Float64, "/cz/" + itf.TOPIC_ERROR_RMS)
    harness.wait_for_subscriber(rig.node, "/cz/" + itf.TOPIC_IMAGE_COMPRESSED, 20.0, rig.procs)
    _wait_for_sim_images(rig)
    for prefix in ("/cz/", "/"):   # both taught now: the test does not rely on the first one
        expect(rig.capture(prefix), True, "loaded")
    harness.spin_until(rig.node, lambda: len(features) >= 10 and len(raw_features) >= 10,
                       10.0, "10 feature messages from each controller", rig.procs)
    assert rms and max(m.data for m in rms) < 0.5   # taught from this very (static) view
    assert len(features[-1].data) == len(raw_features[-1].data) >= 8
    np.testing.assert_allclose(_mean_of_last(features, 10), _mean_of_last(raw_features, 10),
                               atol=0.2)
