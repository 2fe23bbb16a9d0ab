"""Correspondence: Hungarian assignment vs brute force, dot matching by colour and geometry."""
import itertools

import numpy as np
import pytest

from vservo_node.vision.features import Detection
from vservo_node.vision.image_io import srgb_to_lab, srgb_to_linear
from vservo_node.vision.matching import assign, match_by_key, match_dots

# Five dots on a plane (metres) and their printed colours (sRGB 0..1).
LAYOUT = np.array([[-0.04, -0.04], [0.04, -0.04], [0.04, 0.04], [-0.04, 0.04], [0.012, -0.006]])
COLOURS = np.array([[0.84, 0.16, 0.18], [0.16, 0.63, 0.27], [0.16, 0.27, 0.78],
                    [0.92, 0.78, 0.12], [0.75, 0.2, 0.67]])
KEYS = [("dot", i) for i in range(5)]
H_VIEW = np.array([[2500.0, 300, 320], [-200, 2600, 240], [0.3, -0.4, 1.0]])  # plane -> pixels


def view(points_xy, H=H_VIEW):
    p = np.hstack([points_xy, np.ones((len(points_xy), 1))]) @ H.T
    return p[:, :2] / p[:, 2:]


def detection(points, colours_srgb, gain=1.0):
    n = len(points)
    return Detection("dots", np.asarray(points, float), [("blob", j) for j in range(n)],
                     (640, 480), colours_linear=srgb_to_linear(np.asarray(colours_srgb)) * gain)


def brute_force(cost, allowed):
    """Best (number of allowed pairs, -total cost) over every injective assignment."""
    n, m = cost.shape
    best = None
    if n <= m:
        maps = (list(zip(range(n), perm)) for perm in itertools.permutations(range(m), n))
    else:
        maps = (list(zip(perm, range(m))) for perm in itertools.permutations(range(n), m))
    for pairs in maps:
        ok = [(r, c) for r, c in pairs if allowed[r, c]]
        score = (len(ok), -sum(cost[r, c] for r, c in ok))
        best = score if best is None or score > best else best
    return best


@pytest.mark.parametrize("shape", [(3, 3), (4, 6), (5, 5), (6, 4), (2, 5)])
def test_hungarian_equals_brute_force(shape):
    # Kuhn 1955: the Hungarian method finds the optimum; brute force over
    # itertools.permutations is the independent check (gated pairs must stay out).
    rng = np.random.default_rng(sum(shape))
    for _ in range(60):
        cost = rng.uniform(0, 50, shape)
        allowed = rng.uniform(size=shape) < 0.7
        rows, cols = assign(cost, allowed)
        assert allowed[rows, cols].all()
        n_pairs, neg_cost = brute_force(cost, allowed)
        assert len(rows) == n_pairs
        assert cost[rows, cols].sum() == pytest.approx(-neg_cost, abs=1e-9)


def test_distinct_colours_are_matched_whatever_the_order():
    order = np.array([3, 0, 4, 1, 2])
    det = detection(view(LAYOUT)[order], COLOURS[order])
    m = match_dots(det, KEYS, srgb_to_lab(COLOURS), LAYOUT)
    assert m.ok and m.keys == KEYS and not m.missing and not m.rejected
    assert np.allclose(m.points, view(LAYOUT))
    assert np.allclose(m.ref_points, LAYOUT)


@pytest.mark.parametrize("gain", [0.45, 0.7, 1.4, 2.2])
def test_exposure_gain_is_absorbed(gain):
    # A global exposure change scales linear-light colours; the fitted gain undoes it.
    det = detection(view(LAYOUT), COLOURS, gain=gain)
    m = match_dots(det, KEYS, srgb_to_lab(COLOURS), LAYOUT)
    assert m.keys == KEYS
    assert m.quality["gain"] == pytest.approx(1 / gain, rel=0.05)
    assert m.quality["delta_e"].max() < 3.0


def test_distractor_and_occlusion():
    pts = view(LAYOUT)
    # dot 2 hidden; a cyan and an orange blob added (not target colours)
    keep = [0, 1, 3, 4]
    cols = np.vstack([COLOURS[keep], [[0.0, 0.8, 0.86], [0.98, 0.5, 0.05]]])
    det = detection(np.vstack([pts[keep], [[50, 60], [600, 400]]]), cols)
    m = match_dots(det, KEYS, srgb_to_lab(COLOURS), LAYOUT)
    assert m.keys == [KEYS[i] for i in keep] and m.missing == [("dot", 2)]
    assert sorted(m.rejected) == [(("blob", 4), "colour"), (("blob", 5), "colour")]
    assert np.allclose(m.points, pts[keep])


def test_same_colour_stray_is_rejected_by_geometry():
    # dot 2 hidden, and a blue blob elsewhere: colour alone would take it for dot 2.
    pts = view(LAYOUT)
    keep = [0, 1, 3, 4]
    det = detection(np.vstack([pts[keep], [[100, 420]]]), np.vstack([COLOURS[keep],
                                                                     COLOURS[2]]))
    m = match_dots(det, KEYS, srgb_to_lab(COLOURS), LAYOUT)
    assert m.keys == [KEYS[i] for i in keep]
    assert m.rejected == [(("blob", 4), "geometry")]


def test_repeated_colours_resolved_by_homography():
    # Dots 0, 1, 2 share one colour and 3, 4 another: only the layout tells them apart.
    cols = np.array([COLOURS[0]] * 3 + [COLOURS[1]] * 2)
    order = np.array([2, 4, 0, 3, 1])
    det = detection(view(LAYOUT)[order], cols[order])
    m = match_dots(det, KEYS, srgb_to_lab(cols), LAYOUT)
    assert m.keys == KEYS and not m.quality["ambiguous"]
    assert np.allclose(m.points, view(LAYOUT))
    assert m.quality["homography_rms_px"] < 1e-3


def test_symmetric_layout_of_one_colour_is_flagged_ambiguous():
    square = LAYOUT[:4]
    cols = np.array([COLOURS[2]] * 4)
    det = detection(view(square), cols)
    m = match_dots(det, KEYS[:4], srgb_to_lab(cols), square)
    assert m.ok and m.quality["ambiguous"]


def test_predictions_separate_repeated_colours_without_layout():
    cols = np.array([COLOURS[0]] * 5)
    pts = view(LAYOUT)
    moved = pts + [3.0, -2.0]
    det = detection(moved[::-1], cols)
    predicted = {k: p for k, p in zip(KEYS, pts)}
    m = match_dots(det, KEYS, srgb_to_lab(cols), None, predicted)
    assert m.keys == KEYS and np.allclose(m.points, moved)
    # a prediction farther than max_jump_px leaves the dot unmatched
    far = {k: p + 1000.0 for k, p in predicted.items()}
    lost = match_dots(det, KEYS, srgb_to_lab(cols), None, far)
    assert len(lost) == 0 and {why for _, why in lost.rejected} == {"position"}


def test_too_few_matches_is_not_ok_and_says_why():
    det = detection(view(LAYOUT)[:3], COLOURS[:3])
    m = match_dots(det, KEYS, srgb_to_lab(COLOURS), LAYOUT)
    assert len(m) == 3 and not m.ok
    assert "need 4" in m.reason and "('dot', 3)" in m.reason


def test_match_by_key():
    keys = [("tag", 3, c) for c in range(4)] + [("tag", 5, 0)]
    det = Detection("markers", np.arange(10.0).reshape(5, 2), keys[::-1], (640, 480))
    ref_keys = [("tag", 3, c) for c in range(4)] + [("tag", 9, 0)]
    m = match_by_key(det, ref_keys, np.zeros((5, 2)) + 7)
    assert m.keys == ref_keys[:4] and m.missing == [("tag", 9, 0)]
    assert m.rejected == [(("tag", 5, 0), "not in reference")]
    assert np.allclose(m.points, det.points[[4, 3, 2, 1]])


@pytest.mark.parametrize("unit", [1.0, 1.0 / 600.0])
def test_ransac_shortcut_only_claims_what_opencv_does(unit):
    """``ransac_keeps_all`` may skip cv2.findHomography(RANSAC) only when OpenCV (the
    independent reference) keeps every point: random views of 5 and 6 points with noise from
    tiny to past the threshold, shifted outliers, swapped pairs and near-collinear triples.
    It must also fire for clean views, or it saves nothing. ``unit``: the same views in pixels
    and in normalized coordinates of a 600 px focal length (how the matcher calls it when the
    camera is known)."""
    import cv2

    from vservo_node.vision.matching import ransac_keeps_all

    rng = np.random.default_rng(5)
    claimed = clean_claimed = clean = 0
    for i in range(3000):
        n = 5 + i % 2
        src = rng.uniform(0.0, 640.0, (n, 2))
        if i % 7 == 0:  # a point almost on the line through two others
            src[2] = src[0] + (src[1] - src[0]) * rng.uniform() + rng.normal(0.0, 1e-3, 2)
        H = np.eye(3) + rng.normal(0.0, 0.1, (3, 3)) * [[1, 1, 50], [1, 1, 50], [1e-3, 1e-3, 0]]
        sigma = (0.05, 0.3, 1.0, 3.0)[i % 4]
        dst = view(src, H) + rng.normal(0.0, sigma, src.shape)
        if i % 3 == 0:
            dst[0] += rng.uniform(0.0, 10.0, 2)
        if i % 11 == 0:
            dst[[0, 1]] = dst[[1, 0]]
        src_u, dst_u = src * unit, dst * unit
        says = ransac_keeps_all(src_u, dst_u, 3.0 * unit)
        _, mask = cv2.findHomography(src_u, dst_u, cv2.RANSAC, 3.0 * unit)
        if says:
            claimed += 1
            assert mask is not None and mask.all(), (i, src, dst, mask)
        if sigma == 0.05 and i % 3 and i % 7 and i % 11:
            clean += 1
            clean_claimed += says
    # random layouts include skinny 4-point samples that extrapolate noise far: not all fire
    assert claimed > 100 and clean_claimed > 0.25 * clean, (claimed, clean_claimed, clean)


def test_skipping_the_diagnostic_fit_changes_nothing_else():
    """fit_rms=False (what Perception asks for) leaves homography_rms_px NaN and every
    correspondence, rejection and other figure as with the fit."""
    pts = view(LAYOUT) + np.random.default_rng(4).normal(0.0, 0.2, (5, 2))
    det = detection(np.vstack([pts, [[100, 420]]]), np.vstack([COLOURS, COLOURS[2]]))
    with_fit = match_dots(det, KEYS, srgb_to_lab(COLOURS), LAYOUT)
    without = match_dots(det, KEYS, srgb_to_lab(COLOURS), LAYOUT, fit_rms=False)
    assert np.isfinite(with_fit.quality["homography_rms_px"])
    assert np.isnan(without.quality["homography_rms_px"])
    assert (without.keys, without.rejected, without.missing) == (
        with_fit.keys, with_fit.rejected, with_fit.missing)
    assert np.array_equal(without.points, with_fit.points)
    assert np.array_equal(without.quality["delta_e"], with_fit.quality["delta_e"])
    assert without.quality["gain"] == with_fit.quality["gain"]
