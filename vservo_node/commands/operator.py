"""Operator commands of the `vservo` tool: drive a running controller node over ROS 2.

    vservo teach [--sim]          capture the taught reference (the simulated cell: move there
                                  first and back afterwards)
    vservo enable [--retry S]     enable motion (servo/enable_motion true)
    vservo disable                disable motion (brakes a moving run)
    vservo start [--wait]         start a run; --wait follows it to its result
    vservo stop                   stop a moving run (brakes to zero)
    vservo status [--once]        one line per state change of the supervisor
    vservo watch                  live image error and state

Each command starts a short-lived ROS 2 node of its own (no ros2cli needed: it runs in the
project's virtual environment as on a ROS 2 install), talks to the controller's std_srvs
services and topics (vservo_node/interface.py) with a bounded wait, prints what the controller
answered and ends. Run it where it can reach the controller: on the same ROS_DOMAIN_ID, and
through tools/isolated when the controller runs there.
"""
from __future__ import annotations

import argparse
import math
import re
import sys
import textwrap
import time

from vservo_node import interface as itf

EXIT_OK = 0           # accepted / done (start --wait: the run converged)
EXIT_REFUSED = 1      # refused (the reason is printed), or start --wait: the run halted
EXIT_USAGE = 2        # bad arguments
EXIT_TIMEOUT = 3      # no such service, no answer, or no result within the bounded wait
EXIT_INTERRUPTED = 130  # Ctrl-C (128 + SIGINT, the shell's convention)

EXIT_CODES = f"""exit codes:
  {EXIT_OK}    accepted (start --wait: the run converged)
  {EXIT_REFUSED}    refused by the controller or the simulated cell (the reason is printed on
       stderr), or start --wait: the run ended halted
  {EXIT_USAGE}    bad arguments
  {EXIT_TIMEOUT}    timed out: the service is not there, did not answer, or no result came within
       the bounded wait (--timeout, --result-timeout)
  {EXIT_INTERRUPTED}  interrupted (Ctrl-C)"""

DEFAULT_TIMEOUT_S = 10.0


class Timeout(Exception):
    """A bounded wait ran out; the message says what was awaited (exit code 3)."""


# ---------------------------------------------------------------------------- formatting
# Pure functions (no ROS), so the lines the commands print are tested without a graph.

def clock_stamp(wall_s: float) -> str:
    """Local wall-clock time of day with milliseconds: ``HH:MM:SS.mmm``."""
    return time.strftime("%H:%M:%S", time.localtime(wall_s)) + f".{int(wall_s % 1 * 1000):03d}"


def _number(value, spec: str) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "-"
    return format(value, spec)


def status_line(status: dict, wall_s: float) -> str:
    """One line of `vservo status`: time, state, reason, run id, RMS error, matched features,
    and last, when the record has one, the halt's detail (what the check saw). Fields the
    record lacks show as ``-``."""
    line = (f"{clock_stamp(wall_s)} state={status.get('state') or '-'} "
            f"reason={status.get('reason') or '-'} run={status.get('run_id') or '-'} "
            f"rms_px={_number(status.get('rms_px'), '.2f')} "
            f"matched={_number(status.get('n_matched'), 'd')}")
    return line + (f" detail={status['detail']}" if status.get("detail") else "")


def watch_line(status: dict, age_s: float) -> str:
    """The live line of `vservo watch`: state, error, gain, speed scale, acting limits."""
    limits = ",".join(status.get("limits_acted") or []) or "-"
    line = (f"{status.get('state') or '-':9s} rms {_number(status.get('rms_px'), '8.2f')} px  "
            f"matched {_number(status.get('n_matched'), '3d')}  "
            f"gain {_number(status.get('gain'), '.2f')}/s  "
            f"scale {_number(status.get('speed_scale'), '.2f')}  limits {limits}")
    if status.get("reason"):
        line += f"  reason {status['reason']}"
    if status.get("run_id"):
        line += f"  run {status['run_id']}"
    if age_s > 1.0:
        line += f"  (no status for {age_s:.1f} s)"
    return line


def result_line(result: dict) -> str:
    """A run result (interface.RESULT_FIELDS) in words; a halt's detail on a second line."""
    if result.get("converged"):
        head = "converged"
    else:
        reason = result.get("reason") or "unknown reason"
        from vservo_node.interface import HALT_REASONS   # no rclpy: the table of reasons
        head = f"halted: {reason}" + (f" ({HALT_REASONS[reason]})" if reason in HALT_REASONS
                                      else "")
    line = (f"{head} after {_number(result.get('time_s'), '.2f')} s, final RMS error "
            f"{_number(result.get('final_rms_px'), '.3f')} px")
    if result.get("final_pose_error_mm") is not None:
        line += (f", pose error {_number(result.get('final_pose_error_mm'), '.3f')} mm "
                 f"{_number(result.get('final_pose_error_deg'), '.3f')} deg (simulator truth)")
    line += f" (run {result.get('run_id') or '?'})"
    if not result.get("converged") and result.get("detail"):
        line += f"\n  detail: {result['detail']}"
    return line


_RUN_STARTED = re.compile(r"^run (\S+) started")


def started_run_id(message: str) -> str | None:
    """The run id in servo/start's reply ("run <id> started"), None if it has none."""
    m = _RUN_STARTED.match(message or "")
    return m.group(1) if m else None


def controller_target(namespace: str | None, node: str) -> tuple[str, str]:
    """(namespace, node name) of the controller from --namespace and --node; --node may be
    fully qualified (``/cell1/vservo``). ValueError when the two disagree."""
    node = node.strip()
    if "/" in node.rstrip("/"):
        ns, _, name = node.rstrip("/").rpartition("/")
        ns = "/" + ns.strip("/")
        if namespace is not None and "/" + namespace.strip("/") != ns:
            raise ValueError(f"--node {node} lies in namespace {ns}, but --namespace says "
                             f"{namespace}; give one of them")
        return ns, name
    if not node:
        raise ValueError("--node must name the controller node")
    return "/" + (namespace or "").strip("/"), node


def fully_qualified(namespace: str, name: str) -> str:
    return namespace.rstrip("/") + "/" + name


# ---------------------------------------------------------------------------- running
def _run(action):
    """The parser's func: run ``action(args)`` from vservo_node.ros.operator_client with
    Ctrl-C as exit 130 without a traceback and timeouts as exit 3."""
    def func(args) -> int:
        try:
            controller_target(args.namespace, args.node)
        except ValueError as exc:
            print(f"vservo {args.command}: {exc}", file=sys.stderr)
            return EXIT_USAGE
        try:
            from vservo_node.ros import operator_client   # needs rclpy: imported only here
            return getattr(operator_client, action)(args)
        except KeyboardInterrupt:
            return EXIT_INTERRUPTED
        except Timeout as exc:
            print(f"vservo {args.command}: timed out: {exc}", file=sys.stderr)
            return EXIT_TIMEOUT
    return func


def _common() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(add_help=False)
    g = p.add_argument_group("which controller")
    g.add_argument("-n", "--namespace", default=None,
                   help="namespace of the controller (and of the simulated cell); default: "
                        "the root namespace")
    g.add_argument("--node", default=itf.CONTROLLER_NODE,
                   help=f"controller node name, or its fully qualified name /NS/NAME "
                        f"(default {itf.CONTROLLER_NODE}); its services and topics are "
                        "looked up in its namespace")
    g.add_argument("--timeout", type=float, default=DEFAULT_TIMEOUT_S, metavar="S",
                   help="bounded wait for a service to appear and answer, s (default "
                        f"{DEFAULT_TIMEOUT_S:g})")
    return p


def _add(sub, name: str, help_text: str, description: str, action: str):
    p = sub.add_parser(name, parents=[_common()], help=help_text,
                       description=textwrap.fill(description, 79), epilog=EXIT_CODES,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.set_defaults(func=_run(action))
    return p


def register(sub) -> None:
    p = _add(sub, "teach", "teach the reference: the controller captures its current view",
             f"Teach the goal view: call {itf.SRV_CAPTURE_REFERENCE} (the controller captures "
             "its current view, saves it under reference.directory and loads it). With --sim "
             f"(the simulated cell): first {itf.SRV_SIM_GO_TO_TAUGHT} (the simulated arm moves "
             "itself to the scenario's taught pose), wait until the controller has processed "
             "an image taken there, capture, then "
             f"{itf.SRV_SIM_GO_TO_START} (back to the start offset; --stay keeps the arm at "
             "the taught pose). Refused while a run moves the arm.",
             "run_teach")
    p.add_argument("--sim", action="store_true",
                   help="simulated cell: move to the taught pose first and back afterwards")
    p.add_argument("--stay", action="store_true",
                   help="with --sim: leave the arm at the taught pose")
    p.add_argument("--move-timeout", type=float, default=60.0, metavar="S",
                   help="with --sim: bounded wait for each move of the simulated arm, s "
                        "(default 60)")

    p = _add(sub, "enable", "enable motion (the controller checks its inputs first)",
             f"Call {itf.SRV_ENABLE_MOTION} true. The controller checks parameters, robot "
             "model, reference, inputs, command topic and permit, and refuses naming each "
             "failed check.", "run_enable")
    p.add_argument("--retry", type=float, default=0.0, metavar="S",
                   help="repeat a refused call every 0.5 s for up to S seconds (inputs take a "
                        "moment to become fresh after start-up); default 0: one call")

    _add(sub, "disable", "disable motion (a moving run brakes to zero)",
         f"Call {itf.SRV_ENABLE_MOTION} false: always accepted; a moving run brakes to zero "
         "(reason motion_disabled).", "run_disable")

    p = _add(sub, "start", "start a run; --wait follows it to its result",
             f"Call {itf.SRV_START}. With --wait, follow the run on {itf.TOPIC_RUN_RESULT} "
             "(transient local) and print its result: exit 0 if it converged, 1 if it halted. "
             f"Ctrl-C while waiting calls {itf.SRV_STOP} (the arm brakes) before exiting "
             "with 130.", "run_start")
    p.add_argument("--retry", type=float, default=0.0, metavar="S",
                   help="repeat a refused call every 0.5 s for up to S seconds; default 0")
    p.add_argument("--wait", action="store_true", help="wait for the run's result")
    p.add_argument("--result-timeout", type=float, default=600.0, metavar="S",
                   help="with --wait: bounded wait for the result, s (default 600; the run's "
                        "own limit is control.max_run_s)")

    _add(sub, "stop", "stop a moving run (brakes to zero)",
         f"Call {itf.SRV_STOP}: a moving run brakes to zero (reason stop_requested); "
         "accepted in every state.", "run_stop")

    p = _add(sub, "status", "print one line per state change of the supervisor",
             f"Follow {itf.TOPIC_STATUS} and print one line per change of state, reason or "
             "run (time, state, reason, run id, RMS image error, matched features). The "
             f"first line may come from {itf.TOPIC_DIAGNOSTICS} (1 Hz), which the controller "
             "publishes even without images. Runs until Ctrl-C (exit 130) unless --once.",
             "run_status")
    p.add_argument("--once", action="store_true",
                   help="print the current state and exit (exit 3 if none within --timeout)")

    p = _add(sub, "watch", "live image error and state",
             f"Follow {itf.TOPIC_STATUS}: on a terminal one line refreshed in place (state "
             "changes stay as lines above it); otherwise a line every --period seconds and "
             "at every state change. Runs until Ctrl-C (exit 130).", "run_watch")
    p.add_argument("--period", type=float, default=1.0, metavar="S",
                   help="without a terminal: seconds between lines (default 1)")
