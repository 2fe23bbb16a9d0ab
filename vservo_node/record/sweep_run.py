"""Running a sweep: one episode judged against the success rule (and kept as a run record
when it failed), in this process, local worker processes or on a Dask cluster."""
from __future__ import annotations

import dataclasses
import math
import sys
import time
import traceback
from concurrent.futures import ProcessPoolExecutor, as_completed
from pathlib import Path
from typing import Any, Iterator

import numpy as np

from vservo_node.record import metrics
from vservo_node.record.sweep_plan import (
    _base_scenario,
    _episode_params,
    _overrides,
    plan,
    scenario_variant,
)
from vservo_node.record.sweep_results import summarize
from vservo_node.record.sweep_spec import (
    BRAKE_ALLOWANCE_S,
    DASK_PINS,
    METRICS,
    SCENE_NAMES,
    Point,
    Success,
    SweepError,
    SweepRun,
    SweepSpec,
)


# ----------------------------------------------------------------------------- one episode
def judge(result, values: dict, success: Success) -> tuple[bool, str, list]:
    """``(success, failure reason, limits exceeded)`` of an EpisodeResult run with parameter
    ``values`` (see the module doc)."""
    slack = 1.0 + success.limit_slack
    checks = (("joint_speed", result.peak_joint_speed_ratio, values["limits.joint_velocity_scale"]),
              ("tool_speed", result.peak_tool_speed, values["limits.tool_linear_speed"]),
              ("camera_speed", result.peak_camera_speed, values["limits.camera_linear_speed"]),
              ("angular_speed", result.peak_angular_speed, values["limits.angular_speed"]))
    exceeded = [name for name, peak, limit in checks if peak > limit * slack]
    if not result.min_limit_margin > 0:
        exceeded.append("joint_position")
    if not result.converged:
        failure = result.reason or "not_converged"
    elif result.pose_error_mm > success.pose_mm or result.pose_error_deg > success.pose_deg:
        failure = "pose_error"
    elif exceeded:
        failure = "limit:" + exceeded[0]
    else:
        failure = ""
    return not failure, failure, exceeded


def run_job(spec: SweepSpec, point: Point, records_dir: str | None = None) -> dict:
    """Run one planned episode; a flat row (axis values, status, success, failure, metrics).
    Status ``ok`` (it ran), ``skipped`` (start out of reach, view not teachable) or ``error``.
    A failed episode is written as a run record under ``records_dir`` when given (its folder
    in the row's ``record``)."""
    from vservo_node.episode import run_scenario_episode
    from vservo_node.vision.reference import BadReferenceError

    row: dict[str, Any] = {"index": point.index, "seed": point.seed, **point.values,
                           "status": "ok", "success": False, "failure": "",
                           "limits_exceeded": ""}
    row.update({k: None for k in METRICS})
    scene = {k: v for k, v in {**spec.fixed, **point.values}.items() if k in SCENE_NAMES}
    try:
        values = _episode_params(spec, point)
        try:
            scenario, focal_scale = scenario_variant(_base_scenario(spec.scenario), scene,
                                                     np.random.default_rng(point.seed))
        except ValueError as exc:
            return {**row, "status": "skipped", "failure": "start_unreachable",
                    "reason": str(exc).splitlines()[0]}
        overrides = _overrides(spec, point)
        scenario = dataclasses.replace(
            scenario, duration_s=values["control.max_run_s"] + BRAKE_ALLOWANCE_S)
        try:
            result = run_scenario_episode(scenario, overrides, point.seed,
                                          record=records_dir is not None,
                                          focal_scale=focal_scale, sensing=spec.sensing,
                                          noise_px=scene.get("sensing.noise_px"))
        except BadReferenceError as exc:
            return {**row, "status": "skipped", "failure": "teach_failed", "reason": str(exc)}
    except Exception as exc:  # a bug or a broken setup: kept in the table, counted as error
        return {**row, "status": "error", "failure": f"error:{type(exc).__name__}",
                "reason": "".join(traceback.format_exception_only(exc)).strip()}
    ok, failure, exceeded = judge(result, values, spec.success)
    figures = metrics.episode_figures(result, values)
    row.update({k: figures.get(k) for k in METRICS})
    row.update(success=ok, failure=failure, limits_exceeded=";".join(exceeded))
    if not ok and records_dir is not None:
        try:
            row["record"] = str(write_episode_record(
                records_dir, spec, point, scenario, values, result, failure))
        except Exception as exc:   # noqa: BLE001 - the row stands without its record
            row["record"] = f"error:{type(exc).__name__}: {exc}"
    return row


def write_episode_record(root, spec: SweepSpec, point: Point, scenario, values: dict, result,
                         failure: str) -> Path:
    """A failed episode as a run record (see record/episode_record.py); returns its folder."""
    from vservo_node.record.episode_record import write_record

    name = f"episode{point.index:04d}_{failure.replace(':', '_') or 'failed'}"
    return write_record(Path(root), name, scenario, values, result,
                        notes={"sweep": spec.name, "episode": point.index, "seed": point.seed,
                               **{k: v for k, v in point.values.items()}})


# ----------------------------------------------------------------------------- running
class Progress:
    """A plain-text progress bar on ``stream`` (stderr): redrawn in place on a terminal, a
    line per tenth of the work otherwise."""

    def __init__(self, total: int, label: str, stream=None, width: int = 30):
        self.total, self.label, self.width = total, label, width
        self.stream = stream if stream is not None else sys.stderr
        self.done = self.ok = self.failed = 0
        self.t0 = time.perf_counter()
        self.tty = hasattr(self.stream, "isatty") and self.stream.isatty()
        self._tenth = -1

    def update(self, row: dict) -> None:
        self.done += 1
        self.ok += bool(row.get("success"))
        self.failed += not row.get("success")
        tenth = 10 * self.done // max(self.total, 1)
        if self.tty or tenth != self._tenth:
            self._tenth = tenth
            self.stream.write(("\r" if self.tty else "") + self.line()
                              + ("" if self.tty else "\n"))
            self.stream.flush()

    def line(self) -> str:
        elapsed = time.perf_counter() - self.t0
        fraction = self.done / max(self.total, 1)
        filled = int(round(self.width * fraction))
        eta = elapsed / self.done * (self.total - self.done) if self.done else math.nan
        return (f"{self.label} [{'#' * filled}{'.' * (self.width - filled)}] "
                f"{self.done}/{self.total} {100 * fraction:3.0f}%  success {self.ok}  "
                f"other {self.failed}  {elapsed:5.0f} s  eta {eta:4.0f} s")

    def close(self) -> None:
        if self.tty:
            self.stream.write("\n")
            self.stream.flush()


def _one_cv_thread() -> None:
    """Worker start: one OpenCV thread per process, so N workers use N cores."""
    import cv2
    cv2.setNumThreads(1)


def _local_rows(spec, points, workers: int, records_dir=None) -> Iterator[dict]:
    if workers <= 1:
        for point in points:
            yield run_job(spec, point, records_dir)
        return
    import multiprocessing
    # spawn: a fresh interpreter per worker (forking a parent with OpenCV threads can hang)
    with ProcessPoolExecutor(workers, mp_context=multiprocessing.get_context("spawn"),
                             initializer=_one_cv_thread) as pool:
        futures = [pool.submit(run_job, spec, point, records_dir) for point in points]
        for future in as_completed(futures):
            yield future.result()


def _dask_rows(spec, points, address: str, records_dir=None) -> Iterator[dict]:
    try:
        from distributed import Client
        from distributed import as_completed as dask_completed
    except ImportError as exc:
        raise SweepError(f"a Dask scheduler was given ({address}) but the Dask distributed "
                         f"scheduler is not installed; install it with: pip install "
                         f"{DASK_PINS}") from exc
    with Client(address) as client:   # closes this connection only, not the cluster
        futures = client.map(run_job, [spec] * len(points), points,
                             [records_dir] * len(points), pure=False)
        for future in dask_completed(futures):
            yield future.result()


def run_sweep(spec: SweepSpec, workers: int = 1, scheduler: str | None = None,
              progress: bool = True, stream=None, records_dir=None) -> SweepRun:
    """Run every episode of ``spec``: in this process (``workers`` 1), in ``workers`` local
    processes, or on the Dask cluster whose scheduler listens at ``scheduler`` (its workers
    need vservo_node and the scenario files, and ``records_dir`` must be a folder they
    share). Rows come back in plan order whatever ran them, so the same spec gives the same
    table. With ``records_dir``, failed episodes are kept there as run records."""
    if records_dir is not None:
        records_dir = str(Path(records_dir).resolve())
        Path(records_dir).mkdir(parents=True, exist_ok=True)
    points = plan(spec)
    bar = Progress(len(points), f"sweep {spec.name}", stream) if progress else None
    t0 = time.perf_counter()
    rows = []
    source = (_dask_rows(spec, points, scheduler, records_dir) if scheduler
              else _local_rows(spec, points, workers, records_dir))
    for row in source:
        rows.append(row)
        if bar:
            bar.update(row)
    if bar:
        bar.close()
    rows.sort(key=lambda row: row["index"])
    run = SweepRun(spec, rows, time.perf_counter() - t0,
                   f"dask {scheduler}" if scheduler else f"{max(workers, 1)} local")
    run.summary = summarize(run)
    return run
