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

import numpy as np

MM_PER_INCH = 25.4
MARGIN_MM = 10.0       # white around the board
FOOTER_MM = 24.0       # scale bar and caption below the board


def scale_bar_mm(board_width_mm: float) -> float:
    """The scale bar's length: 100 mm, or 50 / 20 / 10 mm when the board is narrower."""
    return next((b for b in (100.0, 50.0, 20.0, 10.0) if b <= board_width_mm), 10.0)


def page_size_mm(target, dpi: float | None = None) -> tuple[float, float]:
    """(width, height) of the page for ``target``, mm; with ``dpi``, rounded to whole pixels
    (so the page's pixels, and with them the board's, are exact)."""
    w, h = target.width * 1e3, target.height * 1e3
    w, h = max(w, 120.0) + 2 * MARGIN_MM, h + 2 * MARGIN_MM + FOOTER_MM
    if dpi:
        px = MM_PER_INCH / dpi
        w, h = round(w / px) * px, round(h / px) * px
    return w, h


def make_page(target, dpi: float, draw_board: bool = True):
    """A matplotlib Figure of the page (inches = mm / 25.4) and its layout: board origin and
    size (mm, from the page's bottom-left; ``board_px``: its top-left pixel and the board
    picture), the scale bar's length (mm). ``draw_board`` False leaves the board out (the PNG
    pastes it pixel for pixel instead: a raster canvas may stretch an image by a pixel)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.patches import Rectangle

    from vservo_node.vision.targets import render_target_texture

    page_w, page_h = page_size_mm(target, dpi)
    px_mm = MM_PER_INCH / dpi   # one output pixel, mm: everything sits on whole pixels
    image, _ = render_target_texture(target, dpi / MM_PER_INCH * 1e3)   # px per metre
    board_w, board_h = image.shape[1] * px_mm, image.shape[0] * px_mm   # within half a pixel
    x0 = round((page_w - board_w) / 2 / px_mm) * px_mm
    y0 = round((FOOTER_MM + MARGIN_MM) / px_mm) * px_mm
    # a hair over the whole pixels: the canvas takes int(inches x dpi) pixels
    fig = Figure(figsize=((page_w + px_mm / 100) / MM_PER_INCH,
                          (page_h + px_mm / 100) / MM_PER_INCH))
    FigureCanvasAgg(fig)
    page = fig.add_axes((0, 0, 1, 1))
    page.set_xlim(0, page_w)
    page.set_ylim(0, page_h)
    page.set_axis_off()
    if draw_board:
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
              f"{target.name}: {kind}, board {target.width * 1e3:g} x "
              f"{target.height * 1e3:g} mm, drawn at "
              f"{dpi:g} dpi.\nPrint at 100 % (actual size). Target frame: origin at the board "
              f"centre, x right, y down.", fontsize=6.5, va="bottom", linespacing=1.4)
    top_left = (round(x0 / px_mm), round((page_h - y0 - board_h) / px_mm))
    return fig, {"board_origin_mm": (x0, y0), "board_mm": (board_w, board_h),
                 "page_mm": (page_w, page_h), "scale_bar_mm": bar,
                 "scale_bar_origin_mm": (bx, by), "board_px": (top_left, image)}


def write_target(target, out: Path, dpi: float) -> dict:
    """Write the page as PDF or PNG (by ``out``'s suffix); returns the layout (make_page)."""
    suffix = out.suffix.lower()
    if suffix not in (".pdf", ".png"):
        raise ValueError(f"{out}: expected a .pdf or .png file name")
    if not 50 <= dpi <= 2400:
        raise ValueError(f"--dpi {dpi}: expected 50 to 2400")
    out.parent.mkdir(parents=True, exist_ok=True)
    if suffix == ".pdf":
        fig, layout = make_page(target, dpi)
        fig.savefig(out, dpi=dpi, format="pdf")
        return layout
    from PIL import Image

    fig, layout = make_page(target, dpi, draw_board=False)
    fig.set_dpi(dpi)
    fig.canvas.draw()
    page = np.asarray(fig.canvas.buffer_rgba())[..., :3].copy()
    (u, v), board = layout["board_px"]
    page[v:v + board.shape[0], u:u + board.shape[1]] = board[..., ::-1]
    Image.fromarray(page).save(out, dpi=(dpi, dpi))
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

