"""The simulated cell: an arm with a wrist camera over a planar target, or a camera on a stand
watching a target on the arm's tool (scenario ``mount``), stepped by the caller.

:class:`SimCell` ties a :class:`~vservo_node.sim.scenario.Scenario` together: the drives
(:class:`~vservo_node.sim.arm.SimArm`) move the true arm, the camera sits on it at the true
hand-eye transform, and images, joint states and ground truth are all functions of the time the
caller asks about. No threads, no clock: lock-step friendly, and the same scenario, seed and
call sequence always give the same results.
"""
from __future__ import annotations

import dataclasses

import numpy as np

from vservo_node.sim.arm import SimArm
from vservo_node.sim.camera_sim import SimCamera
from vservo_node.sim.render import PlanarTexture
from vservo_node.sim.truth import Truth, frame_truth, unoccluded
from vservo_node.vision.targets import render_target_texture

# Finest texture resolution (texels per metre): 0.125 mm texels stay finer than a pixel until
# the camera is closer than f / 8000 (0.077 m at f = 615 px).
TEXTURE_PX_PER_M = 8000.0


def target_texture(target, hidden=(), px_per_m: float = TEXTURE_PX_PER_M) -> PlanarTexture:
    """The printed picture of ``target`` (``vision.targets.Target``) as an RGB
    :class:`PlanarTexture`, with the features ``hidden`` (``(kind, id)``, kind ``dot`` or
    ``tag``) painted over in the board colour."""
    if hidden:
        gone = {ident for _, ident in hidden}
        target = dataclasses.replace(
            target, dots=tuple(d for d in target.dots if d.id not in gone),
            markers=tuple(m for m in target.markers if m.id not in gone))
    bgr, plane_from_texel = render_target_texture(target, px_per_m)
    return PlanarTexture(bgr[..., ::-1], plane_from_texel)


class SimCell:
    """One simulated run of a scenario.

    Args:
        scenario: a loaded :class:`~vservo_node.sim.scenario.Scenario`.
        q0: initial joint positions (default: the scenario's start pose), at rest.
        t0: initial time, seconds.
        command_timeout: seconds without a velocity command before the arm brakes (default:
            the scenario's).

    Attributes: ``camera_info`` (the camera's CameraModel, what a driver would publish),
    ``camera_rate`` (frames per second), ``joint_names``, ``base_frame``, ``camera_frame``,
    ``urdf`` (the robot description text), ``taught_camera_pose`` (true ``T_base_camera`` at
    the taught joints), ``arm`` (the :class:`SimArm`), ``arm_model`` (true kinematics: the
    true hand-eye transform), ``mount`` (None, or the true ``control.mounting.FixedCamera``),
    ``taught_judged_pose`` (:meth:`judged_pose` at the taught joints).
    """

    def __init__(self, scenario, q0=None, t0: float = 0.0, command_timeout: float | None = None):
        self.scenario = scenario
        self.arm_model = scenario.arm_model("true")
        self.joint_names = tuple(self.arm_model.joint_names)
        self.base_frame, self.camera_frame = scenario.base_frame, scenario.camera_frame
        self.urdf = scenario.urdf_path.read_text()
        self.camera_info = scenario.camera
        self.camera_rate = scenario.fps
        self.T_base_target = scenario.T_base_target   # None with a fixed camera: target_pose
        self.mount = scenario.mount("true")
        self.taught_camera_pose = self._camera_pose(scenario.q_taught)
        self.taught_judged_pose = scenario.judged_pose(self.arm_model, scenario.q_taught)
        dynamics = scenario.arm_dynamics
        if command_timeout is not None:
            dynamics = dataclasses.replace(dynamics, command_timeout_s=float(command_timeout))
        q0 = scenario.q_start if q0 is None else q0
        self.arm = SimArm(self.arm_model, q0, dynamics, t0=t0)
        self._camera = None   # built on first use: projected sensing never renders
        hidden = set(scenario.hidden)
        self._hidden_mask = np.array([(k[0], k[1]) in hidden for k in scenario.target.keys()])

    @property
    def camera(self) -> SimCamera:
        """The simulated camera (texture, table, noise tiles), built on first use."""
        if self._camera is None:
            sc = self.scenario
            self._camera = SimCamera(sc.camera, target_texture(sc.target, sc.hidden),
                                     sc.photometric, seed=sc.seed)
        return self._camera

    @property
    def t(self) -> float:
        """Simulation time, seconds."""
        return self.arm.t

    def step(self, dt: float) -> None:
        """Advance the cell by ``dt`` seconds."""
        self.arm.step(dt)

    def command_velocity(self, dq, t: float | None = None) -> None:
        """Joint velocity command (rad/s, ``joint_names`` order) given at ``t`` (default: now)."""
        self.arm.command_velocity(dq, self.t if t is None else t)

    def command_position(self, q, t: float | None = None, duration: float | None = None) -> None:
        """Single-point trajectory to ``q`` (rad) given at ``t`` (default: now), see
        :meth:`SimArm.command_position`."""
        self.arm.command_position(q, self.t if t is None else t, duration)

    def joint_state(self, t: float | None = None):
        """Reported ``(q, dq)`` (rad, rad/s; ``joint_names`` order) at ``t`` (default: now),
        with the scenario's noise; for an image rendered at ``t`` it is the state at the same
        instant."""
        return self.arm.state(t)

    def camera_pose(self, t: float | None = None) -> np.ndarray:
        """True ``T_base_camera`` (4x4) at ``t`` (default: now)."""
        return self._camera_pose(self.arm.true_state(t)[0])

    def _camera_pose(self, q) -> np.ndarray:
        if self.mount is not None:
            return self.mount.T_base_camera.copy()
        return self.arm_model.camera_pose(q)

    def target_pose(self, t: float | None = None) -> np.ndarray:
        """True ``T_base_target`` (4x4) at ``t`` (default: now)."""
        if self.mount is None:
            return self.T_base_target
        return self.arm_model.fk(self.arm.true_state(t)[0]) @ self.mount.T_tool_target

    def judged_pose(self, t: float | None = None) -> np.ndarray:
        """The true pose the arrival tolerances judge at ``t``: the camera's (wrist) or the
        tool's (fixed camera); compare it with ``taught_judged_pose``."""
        return self.scenario.judged_pose(self.arm_model, self.arm.true_state(t)[0])

    def render(self, t: float | None = None) -> np.ndarray:
        """The image (H, W, 3) uint8 RGB exposed at ``t`` (default: now)."""
        t = self.t if t is None else float(t)
        return self.render_at(self.arm.true_state(t)[0], t)

    def render_at(self, q, t: float) -> np.ndarray:
        """The image the camera takes with the arm at ``q`` (e.g. the taught pose), noise
        drawn for time ``t``."""
        return self.camera.render(self.scenario.camera_target(self.arm_model, q), t)

    def truth(self, t: float | None = None) -> Truth:
        """Ground truth at ``t`` (default: now): true joints, poses and feature positions."""
        t = self.t if t is None else float(t)
        q, dq = self.arm.true_state(t)
        T_base_camera = self._camera_pose(q)
        truth = frame_truth(t, q, dq, self.camera_info, self.scenario.target, T_base_camera,
                            T_base_camera @ self.scenario.camera_target(self.arm_model, q))
        return dataclasses.replace(truth, detectable=self._detectable(truth))

    def _detectable(self, truth: Truth) -> np.ndarray:
        """In view, not painted over and not under an occluder active at ``truth.t``."""
        return (truth.in_view & ~self._hidden_mask
                & unoccluded(truth.uv, self.scenario.photometric.occluders, truth.t))
