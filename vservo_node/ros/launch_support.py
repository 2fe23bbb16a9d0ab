"""Helpers the launch files share (launch/arm.launch.py, launch/sim_cell.launch.py).

Importable without the launch packages (``ros_home_folder`` and ``managed_controller`` import
them on call), so the parts that decide something are tested in a plain venv too
(tests/test_launch_files.py).
"""
from __future__ import annotations

import os

from vservo_node import interface, params

# The topic each command interface publishes on (what ``command:=`` remaps).
COMMAND_TOPICS = {"joint_velocity": interface.TOPIC_JOINT_VELOCITY_CMD,
                  "joint_trajectory": interface.TOPIC_JOINT_TRAJECTORY_CMD,
                  "tool_twist": interface.TOPIC_TWIST_CMD,
                  "camera_twist": interface.TOPIC_TWIST_CMD}


def ros_home_folder(*parts):
    """Substitution for $ROS_HOME/<parts>, ROS_HOME defaulting to ~/.ros as ROS 2's tools take
    it: output folders that do not depend on the directory launch was started from."""
    from launch.substitutions import EnvironmentVariable, PathJoinSubstitution
    home = EnvironmentVariable("ROS_HOME",
                               default_value=os.path.join(os.path.expanduser("~"), ".ros"))
    return PathJoinSubstitution([home, *parts])


def node_fqn(namespace: str, name: str) -> str:
    """'/cell1/vservo' from ('cell1' or '/cell1/', 'vservo'); '/vservo' without a namespace."""
    return "/" + "/".join(p for p in (namespace.strip("/"), name) if p)


def command_interface(params_file: str, namespace: str, override: str = "") -> str:
    """The command interface the controller will use: ``override`` when given, else the
    parameter file's value for the node /<namespace>/vservo, else the parameter's default.
    ValueError naming the choices when it is none of COMMAND_TOPICS; an unreadable file counts
    as not setting it (the node reports the file itself)."""
    kind = override
    if not kind:
        try:
            values = params.load_params_file(params_file,
                                             node_fqn(namespace, interface.CONTROLLER_NODE))
        except (OSError, ValueError):
            values = {}
        kind = values.get("io.command_interface",
                          params.BY_NAME["io.command_interface"].default)
    if kind not in COMMAND_TOPICS:
        raise ValueError(f"command_interface {kind!r}: expected one of {', '.join(COMMAND_TOPICS)}")
    return kind


# What the launch files' ``autostart`` argument accepts as true.
TRUE_WORDS = ("true", "1", "yes")


def managed_controller(autostart: str, **node_kwargs) -> list:
    """The controller as a managed node (``vservo_managed``) and, when ``autostart`` is true,
    the transitions that bring it to active: configure at once, activate once launch sees it
    reach ``inactive`` (launch_ros's lifecycle events; the node's own services do the work).
    ``node_kwargs`` go to launch_ros's LifecycleNode (name, namespace, parameters, ...)."""
    from launch.actions import EmitEvent, RegisterEventHandler
    from launch.events import matches_action
    from launch_ros.actions import LifecycleNode
    from launch_ros.event_handlers import OnStateTransition
    from launch_ros.events.lifecycle import ChangeState
    from lifecycle_msgs.msg import Transition

    node = LifecycleNode(package="vservo_node", executable="vservo_managed", **node_kwargs)
    if autostart.lower() not in TRUE_WORDS:
        return [node]

    def change(transition: int) -> EmitEvent:
        return EmitEvent(event=ChangeState(lifecycle_node_matcher=matches_action(node),
                                           transition_id=transition))

    activate = RegisterEventHandler(OnStateTransition(
        target_lifecycle_node=node, start_state="configuring", goal_state="inactive",
        entities=[change(Transition.TRANSITION_ACTIVATE)]))
    return [node, activate, change(Transition.TRANSITION_CONFIGURE)]
