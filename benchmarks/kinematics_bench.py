"""Time ArmModel forward kinematics and Jacobians per call (microseconds) on the demo arms.

    .venv/bin/python benchmarks/kinematics_bench.py

"new q" calls see a different configuration each time (pinocchio recomputes); "same q" calls
hit the cache of the last configuration. "pinocchio floor" is the bare pinocchio work for one
new q (computeJointJacobians + updateFramePlacements + one getFrameJacobian) without our
wrapping, for comparison.
"""
import time

import numpy as np
import pinocchio as pin

from vservo_node.control.kinematics import load_robot

CALLS = 5000


def per_call_us(fn, qs):
    start = time.perf_counter()
    for q in qs:
        fn(q)
    return (time.perf_counter() - start) / len(qs) * 1e6


def main() -> int:
    rng = np.random.default_rng(0)
    for name in ("vs6_bench", "vs7_bench"):
        arm = load_robot(name).arm
        qs = list(rng.uniform(np.where(arm.continuous, -np.pi, arm.lower),
                              np.where(arm.continuous, np.pi, arm.upper), size=(CALLS, arm.n)))
        same = [qs[0]] * CALLS
        model = arm.model
        data = model.createData()
        q_pins = [arm.to_pinocchio_q(q) for q in qs]
        tool_id = model.getFrameId(arm.tool_frame)

        def floor(i):
            pin.computeJointJacobians(model, data, q_pins[i])
            pin.updateFramePlacements(model, data)
            pin.getFrameJacobian(model, data, tool_id, pin.LOCAL_WORLD_ALIGNED)

        rows = [
            ("fk + jacobian_base, new q", per_call_us(
                lambda q: (arm.fk(q), arm.jacobian_base(q)), qs)),
            ("camera_pose + jacobian_tool, new q", per_call_us(
                lambda q: (arm.camera_pose(q), arm.jacobian_tool(q)), qs)),
            ("fk + jacobian_base, same q (cached)", per_call_us(
                lambda q: (arm.fk(q), arm.jacobian_base(q)), same)),
            ("pinocchio floor, new q", per_call_us(floor, range(CALLS))),
        ]
        print(f"{name} (n={arm.n}, {CALLS} calls each)")
        for label, us in rows:
            print(f"  {label:38s} {us:8.1f} us/call")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
