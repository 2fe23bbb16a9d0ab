"""Suite-wide settings.

Hypothesis explores new random examples on every local run; under CI (CI=true, as the CI
runner sets it) it is derandomized, so a landing is judged on a reproducible set of examples
and a newly found edge case shows up in a developer's run instead of failing a landing at
random. Run `pytest --hypothesis-seed=N` to reproduce a local finding.
"""
import os

from hypothesis import settings

settings.register_profile("ci", derandomize=True)
if os.environ.get("CI"):
    settings.load_profile("ci")
