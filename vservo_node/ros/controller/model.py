"""What ``configure`` builds: the arm model, the servo, and perception with the taught view.

The arm model comes from ``robot.urdf_path``, else the ``robot_description`` parameter, else
the ``robot_description`` topic (transient local; the subscription lives from configure to
cleanup). Target and reference files are read here, at configure and when a parameter names
new ones (``ParameterHandling``), never on the output tick; perception is (re)built from the
files already read once a camera model exists (``camera_info``). Each missing piece is kept
as a problem in ``self._problems`` for the enable check.
"""
from __future__ import annotations

from pathlib import Path

from std_msgs.msg import String

from vservo_node import interface as itf
from vservo_node import params
from vservo_node.control import frames
from vservo_node.control.kinematics import ArmModel
from vservo_node.control.mounting import mount_from_params
from vservo_node.perception import Perception, taught_view
from vservo_node.ros import qos
from vservo_node.ros.controller.guards import guarded
from vservo_node.ros.controller.inputs import JointHistory
from vservo_node.ros.controller.outputs import CommandOutput
from vservo_node.servo import MOVING_STATES, Servo
from vservo_node.settings import Settings, depth_settings, servo_config
from vservo_node.vision.reference import load_reference
from vservo_node.vision.targets import load_target
from vservo_node.ros.controller.state import ControllerState


class ModelBuilding(ControllerState):
    """Mixin of ControllerNode: the arm model, the servo and perception."""

    # ------------------------------------------------------------------------ robot + servo
    def _load_robot_from_parameters(self) -> None:
        robot = self.settings.robot
        if robot.urdf_path:
            try:
                text = Path(robot.urdf_path).read_text()
            except OSError as exc:
                self._problems["robot_model"] = f"cannot read robot.urdf_path: {exc}"
                self.get_logger().error(self._problems["robot_model"])
                return
            self._load_robot(text, robot.urdf_path)
        elif robot.description:
            self._load_robot(robot.description, "the robot_description parameter")
        else:
            self._problems["robot_model"] = (f"waiting for a URDF on the "
                                             f"{itf.TOPIC_ROBOT_DESCRIPTION} topic")
            self._sub_robot_description = self.create_subscription(
                String, itf.TOPIC_ROBOT_DESCRIPTION, self._on_robot_description, qos.LATCHED)

    @guarded
    def _on_robot_description(self, msg: String) -> None:
        with self._lock:
            if self.servo is not None and self.servo.enabled:
                self._warn("robot_description", "a new robot_description arrived while motion "
                           "is enabled; ignored (disable motion to reload it)")
                return
            self._load_robot(msg.data, f"the {itf.TOPIC_ROBOT_DESCRIPTION} topic")

    def _load_robot(self, urdf: str, source: str) -> None:
        """Arm model from URDF text; the problem is kept for the enable check."""
        robot, io = self.settings.robot, self.settings.io
        hand_eye = robot.hand_eye
        try:
            arm = ArmModel.from_urdf(urdf, robot.base_frame, robot.tool_frame,
                                     None if hand_eye or robot.camera_mount == "fixed"
                                     else robot.camera_frame, robot.min_joints)
            if hand_eye:
                arm.set_hand_eye(frames.transform_from_xyz_quat(hand_eye[:3], hand_eye[3:]))
            CommandOutput.check_order(io.command_joint_order, arm.joint_names)
        except ValueError as exc:
            self.arm = None
            self._problems["robot_model"] = f"from {source}: {exc}"
            self.get_logger().error(f"robot model refused: {self._problems['robot_model']}")
            return
        self.arm = arm
        self._problems["robot_model"] = ""
        self._joints = JointHistory(arm.continuous)
        self._output = CommandOutput(io.command_interface, arm, io.command_joint_order,
                                     self._period, robot.base_frame, robot.camera_frame)
        self.get_logger().info(f"robot model from {source}: {arm.n} joints "
                               f"{', '.join(arm.joint_names)}")
        self._build_servo()

    def _build_servo(self) -> None:
        """A new Servo (disabled) from the arm and valid parameters, or the reason why not."""
        if self.arm is None:
            return
        if not params.validate(self._values).ok:
            self._problems["servo"] = "waiting for valid parameters"
            return
        try:
            settings, limits = servo_config(self.settings, self.arm)
            mount = mount_from_params(self._values, self.arm)   # None: wrist camera
        except ValueError as exc:
            self._problems["servo"] = str(exc)
            self.get_logger().error(f"servo not built: {exc}")
            return
        self.servo = Servo(self.arm, settings, limits, list(self.settings.robot.tool_point),
                           mount=mount)
        self._problems["servo"] = ""
        self._rebuild_vision()

    # ------------------------------------------------------------------------ vision
    @staticmethod
    def _load_vision_files(settings: Settings) -> tuple:
        """(target, reference or None) from the files the parameters name; ValueError or
        OSError naming the file and what is wrong. Reads the disk: configure and the
        parameter path only."""
        target = load_target(settings.target.file)
        reference = (load_reference(settings.reference.file, target)
                     if settings.reference.file else None)
        return target, reference

    def _set_vision_files(self, files: tuple | None = None) -> None:
        """Keep ``files`` (target, reference), or read them from the parameters (``None``);
        a file that cannot be read is kept as the vision problem."""
        if files is None:
            try:
                files = self._load_vision_files(self.settings)
            except (ValueError, OSError) as exc:
                self._vision_files, self._vision_files_problem = None, str(exc)
                self.get_logger().error(f"target or reference refused: {exc}")
                return
        for note in getattr(files[1], "notes", ()):   # an older file: what it lacks
            self.get_logger().info(f"reference {self.settings.reference.file} {note}")
        self._vision_files, self._vision_files_problem = files, ""

    def _rebuild_vision(self) -> None:
        """Perception and the servo's taught view from the target and reference already read
        and the camera model (no file is read here). Deferred while a run moves."""
        if self.servo is not None and self.servo.state in MOVING_STATES:
            self._vision_dirty = True
            return
        self._vision_dirty = False
        self.perception = None
        self._reference = None
        if self.servo is not None:
            self.servo.set_reference(None)
        if self._vision_files is None:
            self._problems["vision"] = self._vision_files_problem or "target not loaded"
            return
        target, reference = self._vision_files
        if self._camera is None:
            self._problems["vision"] = "no camera model yet (camera_info)"
            return
        try:
            perception = Perception(target, self._camera, reference,
                                    depth_settings(self.settings))
            view = (taught_view(reference, self._camera, target) if reference is not None
                    else None)
        except (ValueError, OSError) as exc:
            self._problems["vision"] = str(exc)
            self.get_logger().error(f"perception not ready: {exc}")
            return
        self.perception, self._reference = perception, reference
        self._problems["vision"] = ""
        if self.servo is not None:
            self.servo.set_reference(view)
        self._last_obs = None

    def _rebuild_vision_if_due(self) -> None:
        """The rebuild deferred while a run moved (a camera_info or depth.constant_m change),
        once it no longer moves: called from the executor (diagnostics timer, start, capture),
        never from the output tick."""
        if self._vision_dirty and (self.servo is None or self.servo.state not in MOVING_STATES):
            self._rebuild_vision()
