"""`vservo print-target`: the board lands on the page at its real size. Checked with outside
tools: Pillow reads the PNG's resolution (pHYs), OpenCV's ArUco detector finds the printed
AprilTags with their true side length in pixels, the dots' colour blobs sit where the target
file puts them, and the PDF's MediaBox is the page in points (1/72 inch: ISO 32000-1:2008,
sec. 8.3.2.3, default user space unit; from memory)."""
from __future__ import annotations

import re

import cv2
import numpy as np
import pytest
from PIL import Image

from vservo_node import cli
from vservo_node.commands.print_target import page_size_mm
from vservo_node.vision.targets import load_target

DPI = 200
PX_PER_MM = DPI / 25.4


def _png(tmp_path, name):
    out = tmp_path / f"{name}.png"
    assert cli.main(["print-target", name, "--dpi", str(DPI), "--out", str(out)]) == 0
    return out


@pytest.mark.parametrize("name", ["tray_dots", "tray_tags", "tray_poster"])
def test_png_pixels_and_resolution(tmp_path, name):
    out = _png(tmp_path, name)
    target = load_target(name)
    w_mm, h_mm = page_size_mm(target, DPI)
    with Image.open(out) as im:
        assert im.size == (round(w_mm * PX_PER_MM), round(h_mm * PX_PER_MM))
        assert im.info["dpi"] == pytest.approx((DPI, DPI), abs=0.01)


def _pairwise(points):
    points = np.asarray(points, float)
    return np.linalg.norm(points[:, None] - points[None], axis=2)


def test_printed_tags_have_their_true_size(tmp_path):
    """Each tag's side and the distances between the tags' centres, in pixels, are the target
    file's millimetres times dpi / 25.4 (to the detector's corner accuracy)."""
    target = load_target("tray_tags")
    image = cv2.imread(str(_png(tmp_path, "tray_tags")))
    detector = cv2.aruco.ArucoDetector(cv2.aruco.getPredefinedDictionary(
        cv2.aruco.DICT_APRILTAG_36h11), cv2.aruco.DetectorParameters())
    corners, ids, _ = detector.detectMarkers(cv2.cvtColor(image, cv2.COLOR_BGR2GRAY))
    assert sorted(ids.ravel().tolist()) == sorted(m.id for m in target.markers)
    found, expected = [], []
    for c, i in zip(corners, ids.ravel()):
        marker = next(m for m in target.markers if m.id == i)
        side = np.linalg.norm(np.diff(c[0], axis=0, append=c[0][:1]), axis=1)
        assert side == pytest.approx(marker.size * 1e3 * PX_PER_MM, abs=1.5)
        found.append(c[0].mean(axis=0))
        expected.append(np.array(marker.centre) * 1e3 * PX_PER_MM)
    np.testing.assert_allclose(_pairwise(found), _pairwise(expected), atol=1.5)


def test_printed_dots_sit_where_the_target_file_puts_them(tmp_path):
    """Dot centroids (pixels of each dot's colour) are as far apart as the file's centres, and
    each dot's area gives its radius."""
    target = load_target("tray_dots")
    image = cv2.imread(str(_png(tmp_path, "tray_dots"))).astype(int)
    found, expected = [], []
    for dot in target.dots:
        mask = np.all(np.abs(image - np.array(dot.colour[::-1])) < 30, axis=2)
        v, u = np.nonzero(mask)
        found.append((u.mean(), v.mean()))
        expected.append(np.array(dot.centre) * 1e3 * PX_PER_MM)
        assert np.sqrt(mask.sum() / np.pi) == pytest.approx(dot.radius * 1e3 * PX_PER_MM,
                                                            rel=0.05)
    np.testing.assert_allclose(_pairwise(found), _pairwise(expected), atol=1.0)


def test_pdf_page_is_the_physical_size(tmp_path):
    out = tmp_path / "tags.pdf"
    assert cli.main(["print-target", "tray_tags", "--out", str(out)]) == 0
    box = re.search(rb"/MediaBox\s*\[\s*([\d.]+)\s+([\d.]+)\s+([\d.]+)\s+([\d.]+)\s*\]",
                    out.read_bytes())
    w_mm, h_mm = page_size_mm(load_target("tray_tags"), 600)
    assert float(box.group(3)) == pytest.approx(w_mm / 25.4 * 72, abs=0.01)
    assert float(box.group(4)) == pytest.approx(h_mm / 25.4 * 72, abs=0.01)


def test_refusals(tmp_path, capsys):
    assert cli.main(["print-target", "tray_dots", "--out", str(tmp_path / "x.svg")]) == 2
    assert cli.main(["print-target", "no_such_target"]) == 2
    err = capsys.readouterr().err
    assert "expected a .pdf or .png" in err and "Traceback" not in err


def test_the_scale_bar_is_as_long_as_it_says(tmp_path):
    """The bar's outline (its top and bottom edges: the longest unbroken dark run in any row
    below the board) is its stated length in pixels (to a pixel and a half: the line's
    anti-aliased ends)."""
    from vservo_node.commands.print_target import scale_bar_mm
    target = load_target("tray_tags")
    grey = cv2.imread(str(_png(tmp_path, "tray_tags")), cv2.IMREAD_GRAYSCALE)
    below = grey[int(grey.shape[0] * 0.8):]
    longest = 0
    for row in below < 128:
        edges = np.flatnonzero(np.diff(np.r_[0, row.astype(int), 0]))
        if len(edges):
            longest = max(longest, int(np.max(edges[1::2] - edges[::2])))
    assert longest == pytest.approx(scale_bar_mm(target.width * 1e3) * PX_PER_MM, abs=1.5)
