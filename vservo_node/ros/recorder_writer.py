"""The recorder's run segmentation and its bag-writing thread (split out of
``recorder_node``, which documents the recorder's behaviour and re-exports these names).
No rclpy here: the node hands in decoded status dicts and serialized messages."""
from __future__ import annotations

import functools
import os
import queue
import threading
from collections.abc import Callable
from pathlib import Path

from vservo_node import interface as itf
from vservo_node.record.bag import PARAMS_FILE, RunRecorder
from vservo_node.yaml_files import dump_yaml

MOVING_STATES = itf.MOVING_STATES
END_STATES = itf.ENDED_STATES


def type_name(msg_class) -> str:
    """ROS 2 type name of a generated message class: JointState -> 'sensor_msgs/msg/JointState'."""
    return f"{msg_class.__module__.split('.')[0]}/msg/{msg_class.__name__}"


class RunSegmenter:
    """Decides from status records and run results when a run's bag opens and closes.

    Pure logic (no ROS); ``now`` is a monotonic time in seconds. ``recording`` says whether a
    bag is open; ``run_id`` is the run being (or last) recorded.
    """

    def __init__(self, tail_s: float, continuous: bool = False):
        self.tail_s, self.continuous = tail_s, continuous
        self.recording = continuous
        self.run_id: str | None = None
        self.close_at: float | None = None

    def on_status(self, record: dict, now: float) -> list[str]:
        """Actions for one status record, in order: 'close' (the open bag), 'open' (a new one)."""
        run_id, state = record.get("run_id"), record.get("state")
        if state in MOVING_STATES and run_id and run_id != self.run_id:
            actions = [] if self.continuous else ["close"] * self.recording + ["open"]
            self.run_id, self.recording, self.close_at = run_id, True, None
            return actions
        if state in END_STATES and run_id == self.run_id:
            self._end(now)
        return []

    def on_result(self, result: dict, now: float) -> bool:
        """True when ``result`` belongs to the run being recorded (then it is to be saved)."""
        if not (self.recording and self.run_id and result.get("run_id") == self.run_id):
            return False
        self._end(now)
        return True

    def on_tick(self, now: float) -> bool:
        """True when the tail of the ended run is over: close the bag."""
        if self.close_at is None or now < self.close_at:
            return False
        self.recording, self.close_at = False, None
        return True

    def _end(self, now: float) -> None:
        if self.recording and not self.continuous and self.close_at is None:
            self.close_at = now + self.tail_s


class BagWriter:
    """Runs the RunRecorder operations on one thread, in the order they were enqueued.

    ``make_recorder(params)`` opens a bag; ``on_closed(path, report)`` is called (on the writer
    thread) after each close, with the ``report`` flag given to `close`. Messages beyond
    ``max_pending_bytes`` waiting in the queue are dropped and counted in ``dropped``. Errors
    are logged through ``log`` (an rclpy logger), once per bag for write errors.
    """

    def __init__(self, make_recorder: Callable[[dict | None], RunRecorder],
                 on_closed: Callable[[Path, bool], None], max_pending_bytes: int, log):
        self._make_recorder, self._on_closed, self._log = make_recorder, on_closed, log
        self._max_pending = max_pending_bytes
        self._pending = 0
        self._lock = threading.Lock()
        self.dropped = 0
        self._recorder: RunRecorder | None = None
        self._write_failed = False
        self._queue: queue.SimpleQueue = queue.SimpleQueue()
        self._thread = threading.Thread(target=self._run, name="vservo_recorder_writer",
                                        daemon=True)
        self._thread.start()

    def open(self, params: dict | None) -> None:
        self._queue.put(functools.partial(self._open, params))

    def write(self, topic: str, msgtype: str, raw: bytes, stamp_ns: int) -> None:
        with self._lock:
            if self._pending + len(raw) > self._max_pending:
                self.dropped += 1
                return
            self._pending += len(raw)
        self._queue.put(functools.partial(self._write, topic, msgtype, raw, stamp_ns))

    def set_result(self, result: dict) -> None:
        """Save the run result (result.json) in the open bag."""
        self._queue.put(functools.partial(self._set_result, result))

    def set_params(self, params: dict) -> None:
        """Write params.yaml into the open bag unless it has one."""
        self._queue.put(functools.partial(self._set_params, params))

    def close(self, report: bool = True) -> None:
        self._queue.put(functools.partial(self._close, report))

    def stop(self) -> None:
        """Finish every queued operation, then end the thread (the open bag stays open)."""
        self._queue.put(None)
        self._thread.join()

    def _run(self) -> None:
        while (operation := self._queue.get()) is not None:
            try:
                operation()
            except Exception as exc:   # noqa: BLE001 - the recorder must outlive a bad bag
                self._log.error(f"recording failed: {type(exc).__name__}: {exc}")

    def _open(self, params: dict | None) -> None:
        self._write_failed = False
        self._recorder = self._make_recorder(params)
        self._log.info(f"recording into {self._recorder.bag_dir}")
        self._copy_reference(params)

    def _copy_reference(self, params: dict | None) -> None:
        """Copy the controller's reference.file (and the files it names) into the bag."""
        path = reference_file(params)
        if self._recorder is None or not path:
            return
        try:
            copy = self._recorder.copy_reference(path)
        except OSError as exc:
            self._log.warning(f"cannot copy the reference {path} into the bag: {exc}")
            return
        if copy is None:
            self._log.warning(f"reference file {path} not found from this node: the bag keeps "
                              "its path only (params.yaml)")

    def _write(self, topic: str, msgtype: str, raw: bytes, stamp_ns: int) -> None:
        recorder = self._recorder
        try:
            if recorder is not None:
                recorder.write(topic, msgtype, raw, stamp_ns)
        except Exception as exc:   # noqa: BLE001 - reported once per bag, then dropped quietly
            if not self._write_failed:
                self._write_failed = True
                where = recorder.bag_dir if recorder is not None else None
                self._log.error(f"cannot write {topic} into {where}: "
                                f"{exc}; further messages of this bag are dropped")
        finally:
            with self._lock:
                self._pending -= len(raw)

    def _set_result(self, result: dict) -> None:
        if self._recorder is not None:
            self._recorder.set_result(result)

    def _set_params(self, params: dict) -> None:
        if self._recorder is None:
            return
        path = self._recorder.bag_dir / PARAMS_FILE
        if not path.exists():
            tmp = path.with_name(path.name + ".tmp")
            tmp.write_text(dump_yaml(params, sort_keys=False), encoding="utf8")
            os.replace(tmp, path)
            self._log.info(f"controller parameters written to {path}")
            self._copy_reference(params)

    def _close(self, report: bool) -> None:
        recorder, self._recorder = self._recorder, None
        if recorder is not None:
            recorder.close()
            self._on_closed(recorder.bag_dir, report)


def reference_file(params: dict | None) -> str:
    """``reference.file`` of a parameter file form ``{node: {ros__parameters: {...}}}``."""
    for section in (params or {}).values():
        values = section.get("ros__parameters", {}) if isinstance(section, dict) else {}
        if values.get("reference.file"):
            return str(values["reference.file"])
    return ""
