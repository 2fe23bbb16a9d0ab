"""Seeds for the simulator's random numbers: each draw is keyed by what it is for and when, so
results do not depend on how often or in what order the caller asks."""
from __future__ import annotations

# Streams: independent random sequences from one scenario seed.
TABLE, IMAGE_NOISE, JOINT_NOISE = 0, 1, 2


def seed_material(seed: int, stream: int, t: float | None = None) -> list:
    """Entropy for ``numpy.random.default_rng``: the scenario ``seed``, the ``stream`` and, for
    per-instant draws, the time ``t`` in whole nanoseconds."""
    material = [int(seed), int(stream)]
    if t is not None:
        material.append(int(round(t * 1e9)) & 0xFFFFFFFFFFFFFFFF)
    return material
