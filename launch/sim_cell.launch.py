"""The simulated cell: simulated arm + camera, the servo controller and the run recorder.

    ros2 launch vservo_node sim_cell.launch.py scenario:=tray_twist

Arguments:

- ``scenario``: name in config/scenarios or a path. It reaches every node: the simulator runs
  it; the controller takes its URDF and frames, target, camera rate and the hand-eye it
  believes (on top of ``controller_params``), and names its taught reference after it
  (``<scenario>_station``); the recorder names its bags after it.
- ``controller_params`` (default config/vservo_sim.yaml), ``sim_params`` (default
  config/sim_cell.yaml): parameter files, keyed ``/**/<node>``.
- ``use_sim_time`` (default false): the simulator's ``publish_clock`` follows it, so /clock
  is there exactly when the nodes wait for it. false (the default, what ``vservo demo`` and
  the end-to-end tests run): stamps are wall time, and a simulator that falls behind on a busy
  machine skips ahead instead of stamping ever later; this agrees with the controller's
  supervisor, which times runs, timeouts and its follow check on the steady clock. true:
  images, joint states, node clocks and recorded log times are simulated time (needed for
  ``real_time_factor`` other than 1 or ``lock_step`` in ``sim_params``); the supervisor still
  judges motion on the steady clock, so a simulator that cannot keep real time then looks
  like an arm that does not follow (runs halt ``not_following``; measured under load).
- ``reference_file``: a taught reference to load at start (empty: teach one with
  ``servo/capture_reference`` at the taught pose); ``reference_dir``: where taught references
  are written (default ``$ROS_HOME/vservo/references``, ROS_HOME defaulting to ~/.ros).
- ``record`` (default true) and ``output_dir`` (default ``$ROS_HOME/vservo/runs``): one bag per
  run. Neither folder depends on where launch was started.
- ``autostart`` (default true): configure and activate the controller, a managed
  (lifecycle) node; false leaves it unconfigured (see arm.launch.py).
- ``enclave``: SROS2 enclave every node runs in (``--enclave``; empty: none), see
  arm.launch.py.

The controller starts with motion disabled: teach at the taught pose, then enable and start it
(servo/capture_reference, servo/enable_motion, servo/start), or run `vservo demo`, which
does all of this without launch.
"""
import os

from ament_index_python.packages import get_package_share_directory
from launch import LaunchDescription
from launch.actions import DeclareLaunchArgument, OpaqueFunction
from launch.substitutions import LaunchConfiguration
from launch_ros.actions import Node

from vservo_node import interface
from vservo_node.params import flatten
from vservo_node.ros.demo_run import scenario_controller_params
from vservo_node.ros.launch_support import managed_controller, ros_home_folder
from vservo_node.sim import load_scenario

PACKAGE = "vservo_node"


def _nodes(context):
    def arg(name):
        return LaunchConfiguration(name).perform(context)

    scenario_ref = arg("scenario")
    scenario = load_scenario(scenario_ref)   # a bad name stops the launch with the reason
    use_sim_time = LaunchConfiguration("use_sim_time")
    enclave = arg("enclave")
    ros_arguments = ["--enclave", enclave] if enclave else []
    controller = flatten(scenario_controller_params(scenario))
    controller.update({"use_sim_time": use_sim_time, "reference.directory": arg("reference_dir"),
                       "reference.name": f"{scenario.name}_station"})
    if arg("reference_file"):
        controller["reference.file"] = arg("reference_file")
    return [
        Node(package=PACKAGE, executable="vservo_sim", name=interface.SIM_NODE, output="screen",
             parameters=[arg("sim_params"),
                         {"scenario": scenario_ref, "use_sim_time": use_sim_time,
                          "publish_clock": use_sim_time}],
             ros_arguments=ros_arguments),
        *managed_controller(arg("autostart"), name=interface.CONTROLLER_NODE, namespace="",
                            output="screen", parameters=[arg("controller_params"), controller],
                            ros_arguments=ros_arguments),
    ] + ([Node(package=PACKAGE, executable="vservo_recorder", name=interface.RECORDER_NODE,
               # the recorder closes its bag and writes the report of a run that just ended
               # on SIGINT: up to ~10 s on a busy machine, longer than launch's default 5 s
               sigterm_timeout="20",
               output="screen",
               parameters=[{"scenario": scenario.name, "output_dir": arg("output_dir"),
                            "use_sim_time": use_sim_time}],
               ros_arguments=ros_arguments)]
         if arg("record").lower() in ("true", "1", "yes") else [])


def generate_launch_description():
    config = os.path.join(get_package_share_directory(PACKAGE), "config")
    return LaunchDescription([
        DeclareLaunchArgument("scenario", default_value="tray_twist",
                              description="scenario name (config/scenarios) or path"),
        DeclareLaunchArgument("controller_params",
                              default_value=os.path.join(config, "vservo_sim.yaml"),
                              description="parameter file of the servo controller"),
        DeclareLaunchArgument("sim_params", default_value=os.path.join(config, "sim_cell.yaml"),
                              description="parameter file of the simulated cell"),
        DeclareLaunchArgument("use_sim_time", default_value="false",
                              description="all nodes follow the simulator's /clock, which the "
                                          "simulator then publishes (default: wall time)"),
        DeclareLaunchArgument("reference_file", default_value="",
                              description="taught reference to load (empty: teach one)"),
        DeclareLaunchArgument("reference_dir", default_value=ros_home_folder("vservo", "references"),
                              description="folder of taught references"),
        DeclareLaunchArgument("record", default_value="true",
                              description="record each run as a rosbag2 bag (MCAP)"),
        DeclareLaunchArgument("output_dir", default_value=ros_home_folder("vservo", "runs"),
                              description="folder for recorded runs"),
        DeclareLaunchArgument("autostart", default_value="true",
                              description="configure and activate the controller (a managed "
                                          "node); false: leave it unconfigured"),
        DeclareLaunchArgument("enclave", default_value="",
                              description="SROS2 enclave of the nodes, e.g. /vservo (empty: none)"),
        OpaqueFunction(function=_nodes),
    ])
