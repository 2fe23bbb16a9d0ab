"""The servo controller alone, against a real arm or an external simulator.

    ros2 launch vservo_node arm.launch.py params_file:=/path/to/my_cell.yaml \
        image:=/wrist_cam/image_raw camera_info:=/wrist_cam/camera_info \
        joint_states:=/joint_states command:=/forward_velocity_controller/commands

Start from config/real_arm_template.yaml. Remap the inputs and the command output to your cell's
topics; `command` is the joint velocity output (std_msgs/Float64MultiArray). `enclave` runs the
node in an SROS2 security enclave (empty: none). `record:=true` adds the run recorder.
The node starts with motion disabled. Read the README's safety section first.
"""
import os

from ament_index_python.packages import get_package_share_directory
from launch import LaunchDescription
from launch.actions import DeclareLaunchArgument, OpaqueFunction
from launch.conditions import IfCondition
from launch.substitutions import LaunchConfiguration
from launch_ros.actions import Node

PACKAGE = "vservo_node"


def _controller(context, remaps):
    """The controller node; --enclave only when one is given (an empty one is an error)."""
    enclave = LaunchConfiguration("enclave").perform(context)
    return [Node(package=PACKAGE, executable="vservo_node", name="vservo", output="screen",
                 namespace=LaunchConfiguration("namespace"),
                 parameters=[LaunchConfiguration("params_file")], remappings=remaps,
                 ros_arguments=["--enclave", enclave] if enclave else [])]


def generate_launch_description():
    share = get_package_share_directory(PACKAGE)
    arg = LaunchConfiguration
    remaps = [("camera/image", arg("image")), ("camera/camera_info", arg("camera_info")),
              ("joint_states", arg("joint_states")),
              ("servo/joint_velocity_cmd", arg("command"))]
    return LaunchDescription([
        DeclareLaunchArgument("params_file",
                              default_value=os.path.join(share, "config", "real_arm_template.yaml"),
                              description="parameter file of the servo controller"),
        DeclareLaunchArgument("image", default_value="camera/image"),
        DeclareLaunchArgument("camera_info", default_value="camera/camera_info"),
        DeclareLaunchArgument("joint_states", default_value="joint_states"),
        DeclareLaunchArgument("command", default_value="servo/joint_velocity_cmd"),
        DeclareLaunchArgument("namespace", default_value=""),
        DeclareLaunchArgument("enclave", default_value="",
                              description="SROS2 enclave, e.g. /vservo (empty: none)"),
        DeclareLaunchArgument("record", default_value="false"),
        DeclareLaunchArgument("output_dir", default_value="runs"),
        OpaqueFunction(function=_controller, args=[remaps]),
        Node(package=PACKAGE, executable="vservo_recorder", name="vservo_recorder",
             output="screen", namespace=arg("namespace"),
             condition=IfCondition(arg("record")),
             parameters=[{"scenario": "live", "output_dir": arg("output_dir")}],
             remappings=remaps),
    ])
