"""`vservo print-target TARGET [--dpi N] [--out FILE.pdf|.png]`: a target to print, to scale.

Draws the board of a target file (dots, markers or a textured poster; the same picture the
simulated cell renders, `vision.targets.render_target_texture`) at its real size on a page
with a margin, corner marks just outside the board, a scale bar (10 mm divisions) and a caption
(name, kind, board size, resolution). PDF: a page of the physical size with the board embedded
at ``--dpi``; print it at 100 % ("actual size", never "fit to page"). PNG: pixels at exactly
``--dpi`` (1 board metre = dpi / 0.0254 px), with the resolution in the file (pHYs). Measure
the scale bar after printing: it must be the length written beside it, or the servo's depths
(taught by PnP from the target's geometry) are off by the same factor.
"""
from __future__ import annotations

import sys
from pathlib import Path

MM_PER_INCH = 25.4
MARGIN_MM = 10.0       # white around the board
FOOTER_MM = 24.0       # scale bar and caption below the board


def scale_bar_mm(board_width_mm: float) -> float:
    """The scale bar's length: 100 mm, or 50 / 20 / 10 mm when the board is narrower."""
    return next((b for b in (100.0, 50.0, 20.0, 10.0) if b <= board_width_mm), 10.0)


def page_size_mm(target) -> tuple[float, float]:
    """(width, height) of the page for ``target``, mm."""
    w, h = target.width * 1e3, target.height * 1e3
    return max(w, 120.0) + 2 * MARGIN_MM, h + 2 * MARGIN_MM + FOOTER_MM


def make_page(target, dpi: float):
    """A matplotlib Figure of the page (inches = mm / 25.4) and its layout: board origin and
    size (mm, from the page's bottom-left), the scale bar's length (mm)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.patches import Rectangle

    from vservo_node.vision.targets import render_target_texture

    page_w, page_h = page_size_mm(target)
    board_w, board_h = target.width * 1e3, target.height * 1e3
    px_mm = MM_PER_INCH / dpi   # one output pixel, mm: the board starts on a whole pixel
    x0 = round((page_w - board_w) / 2 / px_mm) * px_mm
    y0 = round((FOOTER_MM + MARGIN_MM) / px_mm) * px_mm
    image, _ = render_target_texture(target, dpi / MM_PER_INCH * 1e3)   # px per metre
    fig = Figure(figsize=(page_w / MM_PER_INCH, page_h / MM_PER_INCH))
    FigureCanvasAgg(fig)
    page = fig.add_axes((0, 0, 1, 1))
    page.set_xlim(0, page_w)
    page.set_ylim(0, page_h)
    page.set_axis_off()
    board = fig.add_axes((x0 / page_w, y0 / page_h, board_w / page_w, board_h / page_h))
    board.imshow(image[..., ::-1], interpolation="none", aspect="auto",
                 extent=(0, board_w, board_h, 0))
    board.set_axis_off()
    ink = dict(color="k", lw=0.5)
    for cx, cy, sx, sy in ((x0, y0, -1, -1), (x0 + board_w, y0, 1, -1),
                           (x0, y0 + board_h, -1, 1), (x0 + board_w, y0 + board_h, 1, 1)):
        page.plot([cx + sx * 2, cx + sx * 7], [cy, cy], **ink)      # corner marks, 2 mm off
        page.plot([cx, cx], [cy + sy * 2, cy + sy * 7], **ink)
    bar = scale_bar_mm(board_w)
    bx, by = x0, MARGIN_MM + 7.0
    for k in range(int(bar // 10)):
        page.add_patch(Rectangle((bx + 10 * k, by), 10, 2.5, facecolor="k" if k % 2 == 0
                                 else "w", edgecolor="k", lw=0.4))
    page.text(bx, by + 3.5, f"scale bar {bar:g} mm, 10 mm divisions: measure it after "
              f"printing", va="bottom", fontsize=6.5)
    kind = {"dots": f"{len(target.dots)} dots", "markers": f"{len(target.markers)} "
            f"{target.dictionary} markers", "textured": "textured poster"}[target.kind]
    page.text(bx, MARGIN_MM + 1.0,
              f"{target.name}: {kind}, board {board_w:g} x {board_h:g} mm, drawn at "
              f"{dpi:g} dpi.\nPrint at 100 % (actual size). Target frame: origin at the board "
              f"centre, x right, y down.", fontsize=6.5, va="bottom", linespacing=1.4)
    return fig, {"board_origin_mm": (x0, y0), "board_mm": (board_w, board_h),
                 "page_mm": (page_w, page_h), "scale_bar_mm": bar,
                 "scale_bar_origin_mm": (bx, by)}


def write_target(target, out: Path, dpi: float) -> dict:
    """Write the page as PDF or PNG (by ``out``'s suffix); returns the layout (make_page)."""
    suffix = out.suffix.lower()
    if suffix not in (".pdf", ".png"):
        raise ValueError(f"{out}: expected a .pdf or .png file name")
    if not 50 <= dpi <= 2400:
        raise ValueError(f"--dpi {dpi}: expected 50 to 2400")
    fig, layout = make_page(target, dpi)
    out.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(out, dpi=dpi, format=suffix[1:])
    return layout


def run(args) -> int:
    from vservo_node.vision.targets import load_target

    try:
        target = load_target(args.target)
        out = Path(args.out or f"{target.name}.pdf")
        layout = write_target(target, out, float(args.dpi))
    except (OSError, ValueError) as exc:
        print(f"vservo print-target: {exc}", file=sys.stderr)
        return 2
    w, h = layout["page_mm"]
    print(f"{out}: {target.name} ({target.kind}), board {target.width * 1e3:g} x "
          f"{target.height * 1e3:g} mm on a {w:.0f} x {h:.0f} mm page at {args.dpi:g} dpi; "
          f"print at 100 % and check the {layout['scale_bar_mm']:g} mm scale bar")
    return 0


def register(sub) -> None:
    p = sub.add_parser("print-target", help="write a target to print, to scale (PDF or PNG)",
                       description=__doc__)
    p.add_argument("target", help="target file, or the name of a shipped target (e.g. "
                                  "tray_dots, tray_tags, tray_poster)")
    p.add_argument("--dpi", type=float, default=600.0,
                   help="resolution the board is drawn at (default 600)")
    p.add_argument("--out", help="output file, .pdf or .png (default: <target name>.pdf)")
    p.set_defaults(func=run)

