"""The cell-geometry section of a run report (record/report.py calls ``section_html``): the
hand-eye check (calib/check.py) and the loop delay (calib/delay.py) of one recorded run, or
why the record cannot give them."""
from __future__ import annotations

import html

from vservo_node.calib.check import check_hand_eye
from vservo_node.calib.delay import estimate_delay
from vservo_node.calib.trace import trace_from_run


def cell_geometry(run) -> dict:
    """``{"hand_eye": dict | None, "delay": dict | None, "reason": str}`` of a RunData."""
    from vservo_node.record.metrics import run_params

    out = {"hand_eye": None, "delay": None, "reason": ""}
    try:
        trace = trace_from_run(run)
    # a record of another layout (an old reference file, a foreign bag) must not break the
    # report: say why instead
    except (ValueError, KeyError, TypeError, IndexError) as exc:
        out["reason"] = f"{type(exc).__name__}: {exc}"
        return out
    reasons = []
    try:
        out["hand_eye"] = check_hand_eye(trace).as_dict()
    except ValueError as exc:
        reasons.append(f"hand-eye: {exc}")
    rate = run_params(run).get("io.output_rate_hz")
    try:
        if not rate:
            raise ValueError("no io.output_rate_hz in the record's parameters")
        estimate = estimate_delay(trace, 1.0 / float(rate))
        out["delay"] = {**estimate.as_dict(), "lines": estimate.lines()}
    except ValueError as exc:
        reasons.append(f"delay: {exc}")
    out["reason"] = "; ".join(reasons)
    return out


def section_html(run) -> str:
    """``<h2>Cell geometry</h2>`` and what the record says of the hand-eye and the delay."""
    g = cell_geometry(run)
    parts = ["<h2>Cell geometry (hand-eye check, loop delay)</h2>"]
    if g["hand_eye"] is not None:
        parts.append(f"<p>{html.escape(g['hand_eye']['verdict'])}.</p>")
    if g["delay"] is not None:
        parts.append("<p>" + "<br>".join(html.escape(line) for line in g["delay"]["lines"])
                     + "</p>")
    if g["reason"]:
        parts.append(f"<p class='sub'>Not estimated: {html.escape(g['reason'])}</p>")
    return "".join(parts)
