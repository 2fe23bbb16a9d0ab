"""The report's figure basics (page-wide figures, encoding, legends, log axes, halt marks)
and the helpers its figures share: the taught view and the features of a frame
(vservo_node.record.report)."""
from __future__ import annotations

import base64
import io
import math

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import NullFormatter

from vservo_node.interface import SUPERVISOR_STATES
from vservo_node.record.bag import RunData


STATE_COLOURS = dict(zip(SUPERVISOR_STATES, ("#9e9e9e", "#90caf9", "#1e88e5", "#26a69a",
                                             "#43a047", "#fb8c00", "#e53935")))


WIDTH_IN = 11.0   # figure width, inches at 100 dpi: 1100 px, the page's width


def new_figure(width: float = WIDTH_IN, height: float = 3.6, right: float = 1.9,
               left: float = 0.85, hspace: float = 0.32, wspace: float = 0.2) -> Figure:
    """A figure on an Agg canvas, ``width`` x ``height`` inches, with fixed margins in inches
    (``right``: room for the legends outside the plots). Fixed margins, not a layout engine:
    the engine measured every label on every draw and took half of a report's time."""
    fig = Figure(figsize=(width, height))
    FigureCanvasAgg(fig)
    fig.subplots_adjust(left=left / width, right=1 - right / width, bottom=0.55 / height,
                        top=1 - 0.4 / height, hspace=hspace, wspace=wspace)
    return fig


def encode_figure(fig: Figure, fmt_: str = "png") -> tuple[str, str]:
    """(mime type, base64) of the figure at 100 dpi; 'jpeg' for figures of camera images."""
    buf = io.BytesIO()
    if fmt_ == "jpeg":
        fig.savefig(buf, format="jpeg", dpi=100, pil_kwargs={"quality": 85})
    else:
        fig.savefig(buf, format="png", dpi=100)
    return f"image/{fmt_}", base64.b64encode(buf.getvalue()).decode("ascii")


def png_base64(fig: Figure) -> str:
    return encode_figure(fig)[1]


# ----------------------------------------------------------------------------- helpers
def _log_y(ax) -> None:
    """Log y axis with labels on the decades only (minor labels cost most of the drawing)."""
    ax.set_yscale("log")
    ax.yaxis.set_minor_formatter(NullFormatter())


def _legend(ax, **kw) -> None:
    """Legend outside the plot, on its right (never over the curves or the limit lines)."""
    if not ax.get_legend_handles_labels()[0]:
        return
    ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.005, 1.0), borderaxespad=0,
              **kw)


def _halt_marks(ax, metrics: dict) -> None:
    """A red line and the reason at each halt; a green line where the run converged."""
    for halt in metrics["halts"]:
        ax.axvline(halt["t_s"], color="#c62828", lw=1.2)
        ax.annotate(f"halt: {halt['reason'] or '?'}", (halt["t_s"], 0.0), xycoords=("data",
                    "axes fraction"), xytext=(3, 4), textcoords="offset points",
                    fontsize=8, color="#c62828",
                    bbox=dict(boxstyle="square,pad=0.1", fc="w", ec="none", alpha=0.8))


def _acted_rug(ax, run: RunData, names: tuple, label: str | None = None) -> None:
    """Tick marks along the top of ``ax`` at the status records where any of ``names`` acted."""
    acted = [i for i, a in enumerate(run.status["limits_acted"]) if set(a or ()) & set(names)]
    if acted:
        ax.plot(run.status_t[acted], np.ones(len(acted)), "|", color="#c62828", ms=8,
                transform=ax.get_xaxis_transform(), label=label or "limit acted")


def reference_points(run: RunData) -> np.ndarray | None:
    """Reference (goal) pixels (N, 2) as s - e per cycle (e = s - s*, Chaumette & Hutchinson
    2006, eq. 1), median over the cycles where both were recorded."""
    f, e = run.features, run.feature_error
    if f is None or e is None or f.values.shape[1] != e.values.shape[1]:
        return None
    idx = np.clip(np.searchsorted(e.t, f.t), 0, len(e.t) - 1)
    goal = f.values - e.values[idx]
    if not np.any(np.isfinite(goal)):
        return None
    return np.nanmedian(goal, axis=0).reshape(-1, 2)


def _features_at(run: RunData, t: float, within: float = 0.25):
    """(features (N, 2), errors (N, 2)) px recorded nearest to t (within ``within`` s)."""
    f, e = run.features, run.feature_error
    if f is None or not len(f.t):
        return None, None
    i = int(np.argmin(np.abs(f.t - t)))
    if abs(f.t[i] - t) > within:
        return None, None
    uv = f.values[i].reshape(-1, 2)
    err = None
    if e is not None and len(e.t):
        j = int(np.argmin(np.abs(e.t - f.t[i])))
        if e.values.shape[1] == f.values.shape[1] and abs(e.t[j] - f.t[i]) <= within:
            err = e.values[j].reshape(-1, 2)
    return uv, err


def _nice_scale(largest_px: float, wanted_px: float = 40.0) -> float:
    """1, 2 or 5 x 10^k so that the largest error vector is drawn about ``wanted_px`` long
    (never shrunk)."""
    if not largest_px > 0 or largest_px >= wanted_px:
        return 1.0
    raw = wanted_px / largest_px
    k = 10 ** math.floor(math.log10(raw))
    return float(max(m * k for m in (1, 2, 5) if m * k <= raw))


def taught_view(run: RunData):
    """(RGB image, taught pixels (N, 2)) of the reference copied into the record, or None: a
    record without one, a reference written before references kept their image, or a copy
    that does not read (``vision.reference.load_reference`` checks it, image size included)."""
    if run.reference_path is None:
        return None
    from vservo_node.vision.reference import load_reference
    try:
        reference = load_reference(run.reference_path)
    except (ValueError, OSError):
        return None
    image = reference.image
    if image is None:
        return None
    if image.dtype != np.uint8:      # 16-bit mono: shown scaled to 8 bits
        image = (image / max(float(image.max()), 1.0) * 255).astype(np.uint8)
    rgb = np.repeat(image[..., None], 3, axis=2) if image.ndim == 2 else image[..., ::-1]
    return rgb, reference.pixels
