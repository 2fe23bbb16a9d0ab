"""Frame-to-frame jitter of the perceived feature pixels of the shipped scenarios' targets: the
source of the default pixel noise of projected sensing (vservo_node/sim/projected.py).

Run: .venv/bin/python benchmarks/sensing_jitter.py

For each target kind's scenario, the camera held still at the taught pose and half-way to the
start: 40 frames (the scenario's image noise drawn afresh each frame), each perceived from
scratch (tracker reset); the RMS over points of the per-axis standard deviation of the pixels.
"""
from __future__ import annotations

import numpy as np

from vservo_node.perception import Perception
from vservo_node.sim import SimCell, load_scenario
from vservo_node.vision import image_io

SCENARIOS = ("tray_offset", "tray_tags_offset", "tray_poster_offset")


def jitter(name: str, frames: int = 40) -> dict:
    sc = load_scenario(name)
    cell = SimCell(sc)
    w, h = sc.camera.width, sc.camera.height

    def bgr(rgb):
        return image_io.to_bgr_or_mono(rgb, "rgb8", w, h)

    perception = Perception(sc.target, sc.camera)
    perception.set_reference(perception.capture(bgr(cell.render_at(sc.q_taught, -1.0)), "j"))
    out = {}
    for label, q in (("taught", sc.q_taught), ("half-way", 0.5 * (sc.q_taught + sc.q_start))):
        seen = []
        for k in range(frames):
            perception.reset()
            obs, _ = perception.process(bgr(cell.render_at(q, k / sc.fps)), k / sc.fps)
            seen.append(dict(zip(obs.keys, obs.uv)))
        keys = sorted(set.intersection(*(set(s) for s in seen)), key=str)
        uv = np.array([[s[k] for k in keys] for s in seen])
        out[label] = float(np.sqrt(np.mean(uv.std(axis=0) ** 2)))
    return {"kind": sc.target.kind, **out}


def main() -> None:
    print("frame-to-frame pixel jitter (px per axis, RMS over points), camera still:")
    for name in SCENARIOS:
        j = jitter(name)
        print(f"   {name:20s} {j['kind']:9s} taught pose {j['taught']:.4f}   "
              f"half-way {j['half-way']:.4f}")


if __name__ == "__main__":
    main()
