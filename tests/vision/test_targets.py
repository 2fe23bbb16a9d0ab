"""Target files and their textures."""
import cv2
import numpy as np
import pytest

from vservo_node.vision.targets import (load_target, poster_shapes, render_target_texture,
                                        target_from_dict, texture_transform)


@pytest.mark.parametrize("name, kind, n", [("tray_dots", "dots", 5), ("tray_tags", "markers", 16),
                                           ("tray_poster", "textured", 5)])
def test_shipped_targets_load(name, kind, n):
    t = load_target(name)
    assert t.kind == kind and len(t.keys()) == n and t.has_geometry
    pts = t.model_points()
    assert pts.shape == (n, 3) and np.all(pts[:, 2] == 0)
    # every feature lies on the board
    assert np.all(np.abs(pts[:, 0]) < t.width / 2) and np.all(np.abs(pts[:, 1]) < t.height / 2)


def test_dot_colours_are_far_apart_in_cielab():
    # the demo target's dots are told apart by colour alone: pairwise Delta E*ab well above
    # the matcher's 30 gate
    lab = load_target("tray_dots").nominal_lab()
    d = np.linalg.norm(lab[:, None] - lab[None], axis=2)
    assert d[np.triu_indices(len(lab), 1)].min() > 40


def test_texture_transform_maps_pixel_centres_to_metres():
    t = load_target("tray_dots")
    (w, h), T = texture_transform(t, 1000)
    assert (w, h) == (120, 120)
    corner = T @ [-0.5, -0.5, 1]      # outer corner of the top-left pixel
    far = T @ [w - 0.5, h - 0.5, 1]   # outer corner of the bottom-right pixel
    assert np.allclose(corner[:2], [-0.06, -0.06]) and np.allclose(far[:2], [0.06, 0.06])


def test_dot_texture_is_where_the_file_says():
    t = load_target("tray_dots")
    image, T = render_target_texture(t, 4000)
    Ti = np.linalg.inv(T)
    for dot in t.dots:
        u, v, _ = Ti @ [*dot.centre, 1]
        bgr = image[int(round(v)), int(round(u))]
        assert tuple(bgr[::-1]) == dot.colour
        # area of the disc from its coverage: within 0.5 % of pi r^2
        score = np.abs(image.astype(int) - t.background[::-1]).sum(axis=2)
        full = np.abs(np.array(dot.colour[::-1]) - t.background[::-1]).sum()
        r = int(dot.radius * 4000) + 3
        patch = score[int(v) - r:int(v) + r, int(u) - r:int(u) + r] / full
        assert patch.sum() == pytest.approx(np.pi * (dot.radius * 4000) ** 2, rel=0.005)


def test_marker_texture_decodes_to_its_ids():
    t = load_target("tray_tags")
    image, _ = render_target_texture(t, 2000)
    ids = cv2.aruco.ArucoDetector(t.aruco_dictionary()).detectMarkers(image)[1]
    assert sorted(ids.ravel().tolist()) == [3, 7, 11, 19]


def test_poster_is_reproducible_and_resolution_independent():
    t = load_target("tray_poster")
    a, _ = render_target_texture(t, 1000)
    b, _ = render_target_texture(t, 1000)
    c, _ = render_target_texture(t, 3000)
    assert np.array_equal(a, b)
    small = cv2.resize(c, (a.shape[1], a.shape[0]), interpolation=cv2.INTER_AREA)
    assert np.mean(np.abs(small.astype(int) - a)) < 6  # same picture, resampled
    assert len(poster_shapes(t)) == 160


@pytest.mark.parametrize("data, message", [
    ({"name": "x", "kind": "dots", "dots": [{"colour": [1, 2, 3]}] * 2}, "at least 3 dots"),
    ({"name": "x", "kind": "dots", "dots": [{"colour": [1, 2, 300]}] * 3}, "0..255"),
    ({"name": "x", "kind": "dots", "dots": [{"id": 1, "colour": [1, 2, 3]}] * 3}, "unique"),
    ({"name": "x", "kind": "markers", "dictionary": "5x5_9", "markers": [{"id": 1}]},
     "unknown marker dictionary"),
    ({"name": "x", "kind": "textured", "board": {"width": 0.1, "height": 0.1}},
     "needs 'texture'"),
    ({"name": "x", "kind": "shapes"}, "kind 'shapes'"),
    ({"kind": "dots"}, "lacks 'name'"),
])
def test_invalid_targets_are_refused(data, message):
    with pytest.raises(ValueError, match=message):
        target_from_dict(data)


def test_targets_without_positions_cannot_be_drawn_or_posed():
    t = target_from_dict({"name": "loose", "kind": "dots",
                          "dots": [{"colour": c} for c in ([200, 0, 0], [0, 200, 0],
                                                           [0, 0, 200])]})
    assert not t.has_geometry
    with pytest.raises(ValueError, match="no positions"):
        t.model_points()
