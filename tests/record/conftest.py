"""Fixtures: SYNTHETIC TEST DATA runs (see synthetic.py) recorded once per test session."""
from __future__ import annotations

import sys
from pathlib import Path

import pytest
from rosbags.rosbag2 import StoragePlugin

sys.path.insert(0, str(Path(__file__).parent))
import synthetic as syn  # noqa: E402

from vservo_node.record.bag import RunRecorder  # noqa: E402


@pytest.fixture(scope="session")
def spec() -> syn.Spec:
    return syn.Spec()


@pytest.fixture(scope="session")
def recorded(tmp_path_factory, spec) -> Path:
    """A converging run written by RunRecorder from CDR bytes, split every 64 KiB."""
    root = tmp_path_factory.mktemp("runs")
    with RunRecorder(root, "synthetic converge", params=spec.params(),
                     split_bytes=64 * 1024) as rec:
        syn.record_with(rec, spec)
    return rec.bag_dir


@pytest.fixture(scope="session")
def halted_spec() -> syn.Spec:
    return syn.Spec(halt_at=1.0, gain=1.0)


@pytest.fixture(scope="session")
def halted(tmp_path_factory, halted_spec) -> Path:
    root = tmp_path_factory.mktemp("runs_halt")
    with RunRecorder(root, "synthetic halt", params=halted_spec.params()) as rec:
        syn.record_with(rec, halted_spec)
    return rec.bag_dir


@pytest.fixture(scope="session", params=[StoragePlugin.MCAP, StoragePlugin.SQLITE3],
                ids=["mcap", "sqlite3"])
def plain(request, tmp_path_factory, spec) -> Path:
    """The same run as `ros2 bag record` leaves it (single file, closed normally), with the
    topics under a namespace '/cell1'."""
    path = tmp_path_factory.mktemp("plain") / "bag"
    syn.write_plain_bag(path, spec, request.param, ns="/cell1")
    return path
