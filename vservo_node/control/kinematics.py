"""Arm kinematics from a URDF, computed with pinocchio: forward kinematics, geometric Jacobians
in base and tool axes, the hand-eye transform and the camera twist transform.

Conventions (DEVELOPERS.md): SI units and radians; ``T_a_b`` is the pose of frame b in frame a
(4x4); twists and Jacobian rows are ``[v; w]`` (linear m/s first, then angular rad/s).

The model is the serial chain from ``base_frame`` down to ``tool_frame``: every joint off that
path (gripper fingers, a mobile platform or torso above the base, other branches) is locked at
pinocchio's neutral configuration (zero) and the model reduced (``pinocchio.buildReducedModel``).
Poses and Jacobians are expressed relative to ``base_frame``, which need not be the URDF root.
``q`` always holds one value per chain joint, in ``joint_names`` order (radians, metres for
prismatic joints), continuous joints included (pinocchio stores those as ``(cos, sin)``).
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping

import numpy as np
import pinocchio as pin
from numpy.typing import ArrayLike

from vservo_node.control.frames import invert, rotation_block, twist_transform
from vservo_node.paths import shipped
from vservo_node.yaml_entries import EntryReader
from vservo_node.yaml_files import read_bounded

# pinocchio joint model short names, by the kind of URDF joint they come from.
_REVOLUTE = {"JointModelRX", "JointModelRY", "JointModelRZ", "JointModelRevoluteUnaligned"}
_CONTINUOUS = {"JointModelRUBX", "JointModelRUBY", "JointModelRUBZ",
               "JointModelRevoluteUnboundedUnaligned"}
_PRISMATIC = {"JointModelPX", "JointModelPY", "JointModelPZ", "JointModelPrismaticUnaligned"}

# Aliases accepted wherever a frame name is expected.
TOOL = "tool"
CAMERA = "camera"


def _frame_id(model: pin.Model, name: str, role: str) -> int:
    """Id of the frame called ``name`` (a URDF link by preference); ValueError listing the links
    when there is none."""
    if model.existFrame(name, pin.FrameType.BODY):
        return int(model.getFrameId(name, pin.FrameType.BODY))
    if model.existFrame(name):
        return int(model.getFrameId(name))
    links = sorted(f.name for f in model.frames if f.type == pin.FrameType.BODY)
    raise ValueError(f"{role} '{name}' is not a frame of the URDF; available links: "
                     f"{', '.join(links)}")


def _check_transform(T_in: ArrayLike, name: str) -> np.ndarray:
    """Return ``T`` as a 4x4 float array if it is a finite rigid transform, else ValueError."""
    T = np.array(T_in, dtype=float)
    if T.shape != (4, 4) or not np.isfinite(T).all():
        raise ValueError(f"{name} must be a finite 4x4 homogeneous transform, got shape {T.shape}")
    R = T[:3, :3]
    if (not np.allclose(T[3], [0.0, 0.0, 0.0, 1.0])
            or not np.allclose(R.T @ R, np.eye(3), atol=1e-6) or np.linalg.det(R) < 0):
        raise ValueError(f"{name} must be a rigid transform: rotation block orthonormal with "
                         f"determinant +1 (tolerance 1e-6) and last row [0, 0, 0, 1]")
    return T


class ArmModel:
    """Kinematics of the serial chain ``base_frame -> tool_frame`` of a URDF.

    Build with :meth:`from_urdf` or :meth:`from_urdf_file`. Attributes (chain order):

    - ``joint_names``: chain joint names, base to tool; ``n`` their number.
    - ``lower``, ``upper`` (n,): position limits (rad or m); ``-inf``/``inf`` for continuous joints.
    - ``velocity_limits`` (n,): from URDF ``<limit velocity>`` (rad/s or m/s); ``inf`` when the
      URDF gives none (optional for continuous joints).
    - ``continuous`` (n,) bool mask.
    - ``T_tool_camera`` (4x4): hand-eye transform, pose of the camera frame in the tool frame;
      from the URDF when ``camera_frame`` is given, replaced by :meth:`set_hand_eye`; ``None``
      until one of the two provides it.

    Frame arguments (``frame=``) accept a URDF link name, ``"tool"`` (the tool frame) or
    ``"camera"`` (the tool frame moved by ``T_tool_camera``, i.e. the camera as the servo
    believes it to be after a hand-eye override; the URDF camera link stays reachable by name).

    Results for the last ``q`` are cached, so one instance is not safe to share between threads.
    """

    def __init__(self, model: pin.Model, base_frame: str, tool_frame: str,
                 camera_frame: str | None = None, min_joints: int = 6) -> None:
        """Reduce ``model`` (a full pinocchio model of the URDF) to the chain; see the class doc."""
        base_id = _frame_id(model, base_frame, "base frame")
        tool_id = _frame_id(model, tool_frame, "tool frame")
        base_joint = model.frames[base_id].parentJoint
        tool_joint = model.frames[tool_id].parentJoint
        chain_label = f"{base_frame} -> {tool_frame}"
        tool_support = list(model.supports[tool_joint])
        if base_joint not in tool_support:
            raise ValueError(
                f"base frame '{base_frame}' is not upstream of tool frame '{tool_frame}': the "
                f"chain must run from the base down to the tool through the URDF tree")
        above_base = set(model.supports[base_joint])
        chain = [j for j in tool_support if j not in above_base]
        self._check_joint_types(model, chain, chain_label)
        if len(chain) < min_joints:
            raise ValueError(
                f"chain {chain_label} has {len(chain)} joint(s) "
                f"({', '.join(model.names[j] for j in chain) or 'none'}); at least {min_joints} "
                f"expected for servoing a 6-D camera motion. Pass min_joints={len(chain)} to "
                f"allow a smaller arm explicitly")

        self.T_tool_camera: np.ndarray | None = None
        if camera_frame is not None:
            self.T_tool_camera = self._rigid_offset(model, tool_id, camera_frame, tool_frame)

        locked = [j for j in range(1, model.njoints) if j not in chain]
        self._model = pin.buildReducedModel(model, locked, pin.neutral(model))
        self._data = self._model.createData()
        self.base_frame, self.tool_frame, self.camera_frame = base_frame, tool_frame, camera_frame
        self.joint_names = [model.names[j] for j in chain]
        self.n = len(chain)
        # q, limits and Jacobian columns rely on the reduced joints being the chain, in order.
        if list(self._model.names)[1:] != self.joint_names:
            raise RuntimeError(f"pinocchio reduced {chain_label} to joints "
                               f"{list(self._model.names)[1:]}, expected {self.joint_names}")

        joints = list(self._model.joints)[1:]
        self.continuous = np.array([j.shortname() in _CONTINUOUS for j in joints])
        idx_q = np.array([j.idx_q for j in joints])
        self._q_scalar = (np.flatnonzero(~self.continuous), idx_q[~self.continuous])
        self._q_cos = (np.flatnonzero(self.continuous), idx_q[self.continuous])
        # no continuous joint and q laid out as in pinocchio: the configuration is q itself
        self._q_identity = (not self.continuous.any() and self._model.nq == self.n
                            and np.array_equal(idx_q, np.arange(self.n)))
        self.lower = np.full(self.n, -np.inf)
        self.upper = np.full(self.n, np.inf)
        self.lower[self._q_scalar[0]] = self._model.lowerPositionLimit[self._q_scalar[1]]
        self.upper[self._q_scalar[0]] = self._model.upperPositionLimit[self._q_scalar[1]]
        self.velocity_limits = np.array(self._model.velocityLimit, dtype=float)

        # The base is fixed to the reduced model's root: its pose there is one constant.
        self._tool_id = _frame_id(self._model, tool_frame, "tool frame")
        pin.framesForwardKinematics(self._model, self._data, pin.neutral(self._model))
        base_in_reduced = _frame_id(self._model, base_frame, "base frame")
        self._T_base_root = invert(self._data.oMf[base_in_reduced].homogeneous)
        self._R_base_root_block = rotation_block(self._T_base_root[:3, :3])
        self._q_last: np.ndarray | None = None

    # ---------------------------------------------------------------- construction
    @classmethod
    def from_urdf(cls, urdf_text: str, base_frame: str, tool_frame: str,
                  camera_frame: str | None = None, min_joints: int = 6) -> "ArmModel":
        """Build from URDF XML text. ValueError if the URDF does not parse, a frame is unknown,
        the chain holds a joint other than revolute/continuous/prismatic or fewer than
        ``min_joints`` joints, or the camera frame is not rigidly attached to the tool frame."""
        try:
            model = pin.buildModelFromXML(urdf_text)
        except (RuntimeError, ValueError) as exc:
            raise ValueError(f"could not parse the URDF: {exc}") from exc
        return cls(model, base_frame, tool_frame, camera_frame, min_joints)

    @classmethod
    def from_urdf_file(cls, path: str | Path, base_frame: str, tool_frame: str,
                       camera_frame: str | None = None, min_joints: int = 6) -> "ArmModel":
        """Build from a URDF file; see :meth:`from_urdf`."""
        return cls.from_urdf(Path(path).read_text(), base_frame, tool_frame, camera_frame,
                             min_joints)

    @staticmethod
    def _check_joint_types(model: pin.Model, chain: list[int], chain_label: str) -> None:
        for j in chain:
            kind = model.joints[j].shortname()
            if kind not in _REVOLUTE | _CONTINUOUS | _PRISMATIC:
                raise ValueError(
                    f"joint '{model.names[j]}' on the chain {chain_label} is a {kind} in "
                    f"pinocchio; only revolute, continuous and prismatic joints are supported")

    @staticmethod
    def _rigid_offset(model: pin.Model, tool_id: int, camera_frame: str, tool_frame: str
                      ) -> np.ndarray:
        """``T_tool_camera`` from the URDF; ValueError unless no joint separates the two frames."""
        camera_id = _frame_id(model, camera_frame, "camera frame")
        tool, camera = model.frames[tool_id], model.frames[camera_id]
        if camera.parentJoint != tool.parentJoint:
            between = sorted(set(model.supports[camera.parentJoint])
                             ^ set(model.supports[tool.parentJoint]))
            raise ValueError(
                f"camera frame '{camera_frame}' is not rigidly attached to tool frame "
                f"'{tool_frame}': joint(s) {', '.join(model.names[j] for j in between)} lie "
                f"between them; an eye-in-hand camera must be fixed to the tool")
        # Both placements are relative to the same parent joint.
        offset: np.ndarray = (tool.placement.inverse() * camera.placement).homogeneous
        return offset

    @property
    def model(self) -> pin.Model:
        """The reduced pinocchio model of the chain (configuration layout: to_pinocchio_q).
        For reading only: ArmModel caches results computed from it."""
        return self._model

    # ---------------------------------------------------------------- configuration
    def to_pinocchio_q(self, q: ArrayLike) -> np.ndarray:
        """Return the reduced pinocchio configuration (nq,) of ``q`` (n,): continuous joints
        become ``(cos, sin)``."""
        return self._to_pinocchio(self._check_q(q))

    def _to_pinocchio(self, q: np.ndarray) -> np.ndarray:
        if self._q_identity:
            return q.copy()
        q_pin = np.empty(self._model.nq)
        q_pin[self._q_scalar[1]] = q[self._q_scalar[0]]
        angles = q[self._q_cos[0]]
        q_pin[self._q_cos[1]] = np.cos(angles)
        q_pin[self._q_cos[1] + 1] = np.sin(angles)
        return q_pin

    def from_pinocchio_q(self, q_in: ArrayLike) -> np.ndarray:
        """Inverse of :meth:`to_pinocchio_q`; continuous angles come back in (-pi, pi]."""
        q_pin = np.asarray(q_in, dtype=float)
        if q_pin.shape != (self._model.nq,):
            raise ValueError(f"pinocchio configuration must have shape ({self._model.nq},), "
                             f"got {q_pin.shape}")
        q = np.empty(self.n)
        q[self._q_scalar[0]] = q_pin[self._q_scalar[1]]
        q[self._q_cos[0]] = np.arctan2(q_pin[self._q_cos[1] + 1], q_pin[self._q_cos[1]])
        return q

    def q_from_mapping(self, positions: Mapping[str, float]) -> np.ndarray:
        """Return ``q`` (n,) in chain order from a mapping joint name -> position. Names off the
        chain (e.g. gripper fingers in a joint state) are ignored; a missing chain joint is a
        ValueError naming it."""
        missing = [name for name in self.joint_names if name not in positions]
        if missing:
            raise ValueError(f"positions missing for chain joint(s) {', '.join(missing)}; "
                             f"expected all of {', '.join(self.joint_names)}")
        return np.array([float(positions[name]) for name in self.joint_names])

    def _check_q(self, q_in: ArrayLike) -> np.ndarray:
        q = np.asarray(q_in, dtype=float)
        if q.shape != (self.n,):
            raise ValueError(f"q must have shape ({self.n},), one value per joint in the order "
                             f"{', '.join(self.joint_names)}; got shape {q.shape}")
        if not np.isfinite(q).all():
            raise ValueError(f"q must be finite, got {q.tolist()}")
        return q

    def _update(self, q_in: ArrayLike) -> None:
        """Compute placements and joint Jacobians for ``q`` unless they are those of the last
        call (the cache holds a copy, so changing the caller's array in place is safe)."""
        q = self._check_q(q_in)
        if self._q_last is not None and (q == self._q_last).all():  # same shape: checked
            return
        pin.computeJointJacobians(self._model, self._data, self._to_pinocchio(q))
        pin.updateFramePlacements(self._model, self._data)
        self._q_last = q.copy()

    # ---------------------------------------------------------------- frames
    def _resolve(self, frame: str) -> tuple[int, np.ndarray | None]:
        """Return ``(pinocchio frame id, T_parent_frame or None)`` for a frame argument."""
        if frame == TOOL:
            return self._tool_id, None
        if frame == CAMERA:
            return self._tool_id, self._hand_eye()
        return _frame_id(self._model, frame, "frame"), None

    def _hand_eye(self) -> np.ndarray:
        if self.T_tool_camera is None:
            raise ValueError("no camera: give camera_frame when building the ArmModel or call "
                             "set_hand_eye(T_tool_camera)")
        return self.T_tool_camera

    def set_hand_eye(self, T_tool_camera: ArrayLike) -> None:
        """Replace the hand-eye transform (pose of the camera optical frame in the tool frame,
        4x4, metres) by a calibrated one; ValueError unless it is a rigid transform."""
        self.T_tool_camera = _check_transform(T_tool_camera, "T_tool_camera")

    def fk(self, q: ArrayLike, frame: str = TOOL) -> np.ndarray:
        """Return ``T_base_frame`` (4x4, metres): pose of ``frame`` in the base frame at ``q``."""
        fid, T_offset = self._resolve(frame)
        self._update(q)
        T: np.ndarray = self._T_base_root @ self._data.oMf[fid].homogeneous
        return T if T_offset is None else T @ T_offset

    def camera_pose(self, q: ArrayLike) -> np.ndarray:
        """Return ``T_base_camera`` (4x4): tool pose composed with ``T_tool_camera``."""
        return self.fk(q, CAMERA)

    # ---------------------------------------------------------------- Jacobians
    def frame_jacobian_base(self, q: ArrayLike, frame: str = TOOL) -> np.ndarray:
        """Return the 6 x n geometric Jacobian ``[v; w]`` of ``frame``: linear velocity of the
        frame's origin and angular velocity, both in base axes (m/s and rad/s per unit joint
        velocity). Pinocchio's LOCAL_WORLD_ALIGNED Jacobian, rotated into base axes."""
        fid, T_offset = self._resolve(frame)
        self._update(q)
        J: np.ndarray = self._R_base_root_block @ pin.getFrameJacobian(
            self._model, self._data, fid, pin.ReferenceFrame.LOCAL_WORLD_ALIGNED)
        if T_offset is not None:
            # Move the reference point from the parent frame's origin to the offset frame's:
            # v_p = v + w x r = v - [r]x w, with r in base axes.
            R_base_parent = self._T_base_root[:3, :3] @ self._data.oMf[fid].rotation
            J[:3] -= _skew(R_base_parent @ T_offset[:3, 3]) @ J[3:]
        return J

    def jacobian_base(self, q: ArrayLike) -> np.ndarray:
        """Return the 6 x n geometric Jacobian ``[v; w]`` of the tool frame: velocity of the tool
        origin and angular velocity, in base axes (Siciliano et al. 2009, sec. 3.1)."""
        return self.frame_jacobian_base(q, TOOL)

    def jacobian_tool(self, q: ArrayLike) -> np.ndarray:
        """Return the 6 x n tool-frame (body) Jacobian: the base Jacobian re-expressed in tool
        axes, ``rotation_block(R_base_tool).T @ jacobian_base(q)`` (Lynch & Park 2017, Modern
        Robotics, sec. 5.1.3), so the tool twist in tool axes is ``jacobian_tool(q) @ dq``."""
        J = self.jacobian_base(q)
        J_tool: np.ndarray = rotation_block(self.fk(q, TOOL)[:3, :3]).T @ J
        return J_tool

    def point_jacobian_base(self, q: ArrayLike, frame: str, offset_in_frame: ArrayLike
                            ) -> np.ndarray:
        """Return the 3 x n Jacobian of the linear velocity (base axes, m/s) of the point fixed
        at ``offset_in_frame`` (3,), metres in ``frame`` axes: ``v + w x r``. The angular part,
        the same for every point of the body, is ``frame_jacobian_base(q, frame)[3:]``."""
        offset = np.asarray(offset_in_frame, dtype=float)
        if offset.shape != (3,):
            raise ValueError(f"offset_in_frame must have shape (3,), got {offset.shape}")
        J = self.frame_jacobian_base(q, frame)
        r = self.fk(q, frame)[:3, :3] @ offset
        J_point: np.ndarray = J[:3] - _skew(r) @ J[3:]
        return J_point

    def cartesian_jacobians(self, q: ArrayLike, tool_point: ArrayLike
                            ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Return the three 3 x n Jacobians the command limiter needs at ``q``, from one
        kinematics update: the linear velocity of the tool point ``tool_point`` (3,), metres in
        tool axes, the linear velocity of the camera origin (believed hand-eye), and the tool's
        angular velocity, all in base axes. The same values as
        ``point_jacobian_base(q, "tool", tool_point)``, ``point_jacobian_base(q, "camera",
        zeros(3))`` and ``jacobian_base(q)[3:]``, computed by the same expressions."""
        offset = np.asarray(tool_point, dtype=float)
        if offset.shape != (3,):
            raise ValueError(f"tool_point must have shape (3,), got {offset.shape}")
        T_tool_camera = self._hand_eye()
        self._update(q)
        placement = self._data.oMf[self._tool_id]
        J: np.ndarray = self._R_base_root_block @ pin.getFrameJacobian(
            self._model, self._data, self._tool_id, pin.ReferenceFrame.LOCAL_WORLD_ALIGNED)
        R_base_tool = (self._T_base_root @ placement.homogeneous)[:3, :3]
        tool_point_jac = J[:3] - _skew(R_base_tool @ offset) @ J[3:]
        # the camera origin: v + w x r with r the hand-eye offset in base axes (as
        # frame_jacobian_base moves the reference point; the zero offset adds nothing)
        R_base_parent = self._T_base_root[:3, :3] @ placement.rotation
        camera_point_jac = J[:3] - _skew(R_base_parent @ T_tool_camera[:3, 3]) @ J[3:]
        return tool_point_jac, camera_point_jac, J[3:]

    def camera_from_tool(self) -> np.ndarray:
        """Return the 6x6 twist transform with ``V_camera = camera_from_tool() @ V_tool``
        (twists ``[v; w]`` in their own frames): ``twist_transform(invert(T_tool_camera))``."""
        return twist_transform(invert(self._hand_eye()))


def _skew(v: np.ndarray) -> np.ndarray:
    """``frames.skew`` for a 3-vector computed here (no argument checks: this runs several
    times per output cycle)."""
    x, y, z = v.tolist()
    return np.array([[0.0, -z, y], [z, 0.0, -x], [-y, x, 0.0]])


@dataclass(frozen=True)
class RobotConfig:
    """A shipped demo robot: the arm model and its ``home`` configuration (n,), chain order."""
    name: str
    arm: ArmModel
    home: np.ndarray


_ROBOT_KEYS = ("urdf", "base_frame", "tool_frame", "camera_frame", "min_joints", "home",
               "home_goal", "home_seed")
# A URDF is text of links and joints (meshes are separate files): a few kB to ~1 MB for large
# robots; 16 MiB bounds what a robot file can make us read (common practice, no source).
URDF_MAX_BYTES = 16 << 20


class _RobotReader(EntryReader):
    kind = "robot file"


def _joint_values(r: EntryReader, entry_value: Any, entry: str, arm: ArmModel) -> np.ndarray:
    value = r.mapping(entry_value, entry)
    extra = sorted(set(value) - set(arm.joint_names), key=str)
    if extra:
        r.fail(entry, f"names joint(s) off the chain: {', '.join(map(str, extra))}; expected "
                      f"{', '.join(arm.joint_names)}")
    positions = {k: r.number(v, f"{entry}.{k}") for k, v in value.items()}
    try:
        return arm.q_from_mapping(positions)
    except ValueError as exc:
        r.fail(entry, str(exc))


def load_robot(name_or_path: str) -> RobotConfig:
    """Load a robot description YAML (e.g. ``"vs6_bench"`` from config/robots, or a path).

    Keys: ``urdf`` (path relative to the YAML), ``base_frame``, ``tool_frame``,
    ``camera_frame``, optional ``min_joints`` and ``home`` (joint name -> position, exactly the
    chain joints), and ``home_goal``/``home_seed`` (read by config/robots/find_home.py).
    YamlFileError (a ValueError) naming the file and the key on a missing key, a wrong type, a
    URDF that cannot be used or a home that does not name every chain joint; the file is read
    through ``yaml_files.load_yaml`` (size cap, no anchors/aliases or tags).
    """
    path = shipped("robots", name_or_path)
    r = _RobotReader(path)
    spec = r.mapping(r.read_yaml(path), "top level", _ROBOT_KEYS,
                     ("urdf", "base_frame", "tool_frame", "camera_frame", "home"))
    urdf = path.parent / r.text(spec["urdf"], "urdf")
    frames = [r.text(spec[k], k) for k in ("base_frame", "tool_frame", "camera_frame")]
    min_joints = r.integer(spec.get("min_joints", 6), "min_joints", 1, 20)
    text = read_bounded(urdf, URDF_MAX_BYTES, prefix=f"{r.where}: urdf: ")
    try:
        arm = ArmModel.from_urdf(text.decode("utf-8"), frames[0], frames[1], frames[2],
                                 min_joints)
    except ValueError as exc:      # UnicodeDecodeError is one too
        r.fail("urdf", f"{urdf}: {exc}")
    return RobotConfig(path.stem, arm, _joint_values(r, spec["home"], "home", arm))
