"""The simulated cell: simulated arm + camera, the servo controller and the run recorder.

    ros2 launch vservo_node sim_cell.launch.py scenario:=tray_twist

Arguments: scenario (name in config/scenarios or a path), controller_params (parameter file,
default config/vservo_sim.yaml), record (true/false), output_dir (where bags go),
use_sim_time (true: all three nodes follow the simulator's /clock).
The controller starts with motion disabled: enable and start it with its services
(servo/enable_motion, servo/start), or run `vservo demo`, which does all of this.
"""
import os

from ament_index_python.packages import get_package_share_directory
from launch import LaunchDescription
from launch.actions import DeclareLaunchArgument
from launch.conditions import IfCondition
from launch.substitutions import LaunchConfiguration
from launch_ros.actions import Node

PACKAGE = "vservo_node"


def generate_launch_description():
    share = get_package_share_directory(PACKAGE)
    config = os.path.join(share, "config")
    scenario = LaunchConfiguration("scenario")
    use_sim_time = LaunchConfiguration("use_sim_time")
    return LaunchDescription([
        DeclareLaunchArgument("scenario", default_value="tray_twist",
                              description="scenario name (config/scenarios) or path"),
        DeclareLaunchArgument("controller_params",
                              default_value=os.path.join(config, "vservo_sim.yaml"),
                              description="parameter file of the servo controller"),
        DeclareLaunchArgument("sim_params", default_value=os.path.join(config, "sim_cell.yaml"),
                              description="parameter file of the simulated cell"),
        DeclareLaunchArgument("record", default_value="true",
                              description="record each run as a rosbag2 bag (MCAP)"),
        DeclareLaunchArgument("output_dir", default_value="runs",
                              description="folder for recorded runs"),
        DeclareLaunchArgument("use_sim_time", default_value="true",
                              description="follow the simulator's /clock"),
        Node(package=PACKAGE, executable="vservo_sim", name="vservo_sim", output="screen",
             parameters=[LaunchConfiguration("sim_params"),
                         {"scenario": scenario, "use_sim_time": use_sim_time}]),
        Node(package=PACKAGE, executable="vservo_node", name="vservo", output="screen",
             parameters=[LaunchConfiguration("controller_params"),
                         {"use_sim_time": use_sim_time}]),
        Node(package=PACKAGE, executable="vservo_recorder", name="vservo_recorder",
             output="screen", condition=IfCondition(LaunchConfiguration("record")),
             parameters=[{"scenario": scenario, "output_dir": LaunchConfiguration("output_dir"),
                          "use_sim_time": use_sim_time}]),
    ])
