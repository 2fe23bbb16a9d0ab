"""The servo controller alone, against a real arm or an external simulator.

    ros2 launch vservo_node arm.launch.py params_file:=/path/to/my_cell.yaml \
        image:=/wrist_cam/image_raw camera_info:=/wrist_cam/camera_info \
        joint_states:=/joint_states command:=/forward_velocity_controller/commands

Start from config/real_arm_template.yaml (keyed ``/**/vservo``, so it also applies under
``namespace:=...``). Arguments:

- ``image``, ``camera_info``, ``joint_states``: the cell's input topics.
- ``command``: the topic the selected command interface publishes on, whichever it is
  (joint_velocity: std_msgs/Float64MultiArray, joint_trajectory:
  trajectory_msgs/JointTrajectory, tool_twist/camera_twist: geometry_msgs/TwistStamped).
  Empty: the interface's own topic (servo/joint_velocity_cmd, servo/joint_trajectory_cmd,
  servo/twist_cmd).
- ``command_interface``: overrides ``io.command_interface`` of the file (empty: the file's,
  else the parameter's default).
- ``autostart`` (default true): the controller is a managed (lifecycle) node; launch
  configures and activates it. false: it stays unconfigured for a lifecycle manager
  (``ros2 lifecycle set /vservo configure``, then ``activate``).
- ``namespace``; ``use_sim_time`` (default false: a real arm; true under an external
  simulator that publishes /clock).
- ``enclave``: SROS2 enclave every node runs in (``--enclave``; empty: none). Create it with
  ``ros2 security create_enclave <keystore> /vservo`` and set ROS_SECURITY_KEYSTORE,
  ROS_SECURITY_ENABLE=true (and ROS_SECURITY_STRATEGY=Enforce to refuse unsecured peers).
- ``reference_dir``: where ``servo/capture_reference`` writes taught references
  (sets ``reference.directory``; default ``$ROS_HOME/vservo/references``, ROS_HOME defaulting
  to ~/.ros), ``record:=true`` adds the run recorder, writing under ``output_dir`` (default
  ``$ROS_HOME/vservo/runs``). Neither depends on the folder launch was started from.

The node starts with motion disabled, also once active. Read the README's safety section first.
"""
import os

from ament_index_python.packages import get_package_share_directory
from launch import LaunchDescription
from launch.actions import DeclareLaunchArgument, OpaqueFunction
from launch.substitutions import LaunchConfiguration
from launch_ros.actions import Node

from vservo_node import interface
from vservo_node.ros.launch_support import (COMMAND_TOPICS, command_interface,
                                             managed_controller, ros_home_folder)

PACKAGE = "vservo_node"


def _nodes(context):
    def arg(name):
        return LaunchConfiguration(name).perform(context)

    params_file, namespace, enclave = arg("params_file"), arg("namespace"), arg("enclave")
    kind = command_interface(params_file, namespace, arg("command_interface"))
    remaps = [(interface.TOPIC_IMAGE, arg("image")),
              (interface.TOPIC_CAMERA_INFO, arg("camera_info")),
              (interface.TOPIC_JOINT_STATES, arg("joint_states"))]
    if arg("command"):
        remaps.append((COMMAND_TOPICS[kind], arg("command")))
    ros_arguments = ["--enclave", enclave] if enclave else []
    use_sim_time = LaunchConfiguration("use_sim_time")
    overrides = {"use_sim_time": use_sim_time, "reference.directory": arg("reference_dir")}
    if arg("command_interface"):
        overrides["io.command_interface"] = kind
    nodes = managed_controller(arg("autostart"), name=interface.CONTROLLER_NODE,
                               output="screen", namespace=namespace,
                               parameters=[params_file, overrides], remappings=remaps,
                               ros_arguments=ros_arguments)
    if arg("record").lower() in ("true", "1", "yes"):
        nodes.append(Node(package=PACKAGE, executable="vservo_recorder",
                          name=interface.RECORDER_NODE,
               # the recorder closes its bag and writes the report of a run that just ended
               # on SIGINT: up to ~10 s on a busy machine, longer than launch's default 5 s
               sigterm_timeout="20", output="screen", namespace=namespace,
                          parameters=[{"scenario": "live", "output_dir": arg("output_dir"),
                                       "use_sim_time": use_sim_time}],
                          remappings=remaps, ros_arguments=ros_arguments))
    return nodes


def generate_launch_description():
    share = get_package_share_directory(PACKAGE)
    return LaunchDescription([
        DeclareLaunchArgument("params_file",
                              default_value=os.path.join(share, "config", "real_arm_template.yaml"),
                              description="parameter file of the servo controller"),
        DeclareLaunchArgument("image", default_value=interface.TOPIC_IMAGE),
        DeclareLaunchArgument("camera_info", default_value=interface.TOPIC_CAMERA_INFO),
        DeclareLaunchArgument("joint_states", default_value=interface.TOPIC_JOINT_STATES),
        DeclareLaunchArgument("command", default_value="",
                              description="topic of the command output, whichever interface "
                                          "(empty: the interface's own topic)"),
        DeclareLaunchArgument("command_interface", default_value="",
                              description="joint_velocity, joint_trajectory, tool_twist or "
                                          "camera_twist (empty: the parameter file's)"),
        DeclareLaunchArgument("namespace", default_value=""),
        DeclareLaunchArgument("autostart", default_value="true",
                              description="configure and activate the controller (a managed "
                                          "node); false: leave it unconfigured"),
        DeclareLaunchArgument("use_sim_time", default_value="false",
                              description="follow /clock (an external simulator)"),
        DeclareLaunchArgument("enclave", default_value="",
                              description="SROS2 enclave of the nodes, e.g. /vservo (empty: none)"),
        DeclareLaunchArgument("reference_dir", default_value=ros_home_folder("vservo", "references"),
                              description="folder of taught references"),
        DeclareLaunchArgument("record", default_value="false"),
        DeclareLaunchArgument("output_dir", default_value=ros_home_folder("vservo", "runs"),
                              description="folder for recorded runs"),
        OpaqueFunction(function=_nodes),
    ])
