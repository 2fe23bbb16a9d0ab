"""The state the controller's mixins share, declared once (values are set by
``ControllerNode.__init__`` and ``_reset_state``), and for the type checker the methods each
mixin takes from rclpy's LifecycleNode and from the other mixins."""
from __future__ import annotations

import threading
from collections import deque
from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:
    from rclpy.lifecycle import LifecycleNode as _Base
    from rclpy.lifecycle import LifecyclePublisher
    from rclpy.subscription import Subscription

    from vservo_node.control.kinematics import ArmModel
    from vservo_node.perception import Perception
    from vservo_node.ros.controller.inputs import FrameSlot, JointHistory
    from vservo_node.ros.controller.outputs import CommandOutput
    from vservo_node.ros.frame_loss import FrameLossMonitor
    from vservo_node.ros.output_loop import OutputLoop
    from vservo_node.servo import Servo
    from vservo_node.settings import Settings
    from vservo_node.vision.camera import CameraModel
else:
    _Base = object


class ControllerState(_Base):
    """Attributes of ControllerNode that more than one mixin reads or writes."""

    _lock: threading.RLock
    settings: Settings
    _values: dict[str, Any]
    _file_errors: dict[str, str]
    _pending_values: dict[str, Any] | None
    _pending_files: tuple | None
    _configured: bool
    _active: bool
    _shutting_down: bool
    _period: float
    # what configure builds
    arm: ArmModel | None
    servo: Servo | None
    perception: Perception | None
    _problems: dict[str, str]
    _vision_files: tuple | None
    _vision_files_problem: str
    _vision_dirty: bool
    _reference: Any
    _camera: CameraModel | None
    _camera_key: tuple | None
    _camera_problem: str
    _output: CommandOutput | None
    _sub_robot_description: Subscription | None
    # inputs and their health
    _joints: JointHistory | None
    _joint_problem: str
    _rx: dict[str, float | None]
    _frame_problem: str
    _frame_loss: FrameLossMonitor
    _pair_problem: str
    _refused: dict[str, int]
    _permit: bool
    _last_image: tuple[np.ndarray, float, str] | None
    _last_obs: tuple[Any, Any, float] | None
    _depth_frames: deque
    _truth: dict[str, np.ndarray | None]
    _frames: FrameSlot
    _worker: threading.Thread | None
    _subscriptions_active: list
    _image_topic: str
    # outputs and the cycle
    _frame_status: tuple[float, float] | None
    _last_state: tuple[str, str] | None
    _last_status: dict
    _announced: str
    _commanding: bool
    _command_sent: bool
    _command_topic: str
    _last_tick: float | None
    _ticks: int
    _late_ticks: int
    _runs: int
    _warned: dict[str, float]
    _output_loop: OutputLoop | None
    _diagnostics_timer: Any
    _publishers_made: list
    _services_made: list
    _pub_command: LifecyclePublisher
    _pub_status: LifecyclePublisher
    _pub_feature_error: LifecyclePublisher
    _pub_error_rms: LifecyclePublisher
    _pub_features: LifecyclePublisher
    _pub_camera_twist: LifecyclePublisher
    _pub_result: LifecyclePublisher
    _pub_overlay: LifecyclePublisher
    _pub_diagnostics: LifecyclePublisher

    if TYPE_CHECKING:   # provided by the other mixins (see the module docstring)
        def _now(self) -> float: ...
        @staticmethod
        def _servo_time() -> float: ...
        def _warn(self, key: str, message: str, every_s: float = 5.0) -> None: ...
        def _internal_error(self, where: str, exc: Exception) -> None: ...
        def _lifecycle_label(self) -> str: ...
        def _halt(self, reason: str, detail: str = "") -> None: ...
        def _on_output_tick(self) -> None: ...
        def _on_output_error(self, exc: BaseException) -> None: ...
        def _publish_command(self, cmd: np.ndarray, q: np.ndarray) -> None: ...
        def _publish_status(self, servo: Servo, status: dict) -> None: ...
        def _publish_result(self, result: dict) -> None: ...
        def _publish_features(self, obs: Any, info: Any) -> None: ...
        def _publish_overlay(self, image: Any, info: Any, t: float, frame_id: str) -> None: ...
        def _rebuild_vision(self) -> None: ...
        def _rebuild_vision_if_due(self) -> None: ...
        def _set_vision_files(self, files: tuple | None = None) -> None: ...
        @staticmethod
        def _load_vision_files(settings: Settings) -> tuple: ...
        def _build_servo(self) -> None: ...
        def _age(self, what: str) -> float: ...
        def _permit_ok(self) -> bool: ...
        def _pair(self, t: float) -> tuple[np.ndarray | None, str]: ...
        def _parameter_problems(self) -> list[str]: ...
