import json
import math

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from viewer import gesture
from viewer.camera import OrbitCamera

W, H = 800, 600


def front_camera():
    # Hand-checked frame: eye at (0, 0, 5) looking down -Z, right = +X, up = +Y, 45 degree fov.
    return OrbitCamera(distance=5.0, fov_y=math.radians(45))


def world_per_pixel(depth):
    # One window unit spans 2 * depth * tan(fov/2) / height at that depth (pinhole geometry).
    return 2 * depth * math.tan(math.radians(22.5)) / H


def test_grab_hand_checked_front_view():
    cam = front_camera()
    p = gesture.grab(cam, [0, 0, 0], 0.5, (400, 300), (460, 280), W, H)
    assert p["kind"] == "grab" and p["center"] == [0, 0, 0] and p["radius"] == 0.5
    s = world_per_pixel(5.0)
    np.testing.assert_allclose(p["move"], [60 * s, -20 * s, 0], atol=1e-12)
    # A centre nearer the eye moves less per pixel: the plane sits at depth 3.
    p = gesture.grab(cam, [0.1, 0.2, 2.0], 0.5, (100, 100), (110, 100), W, H)
    np.testing.assert_allclose(p["move"], [10 * world_per_pixel(3.0), 0, 0], atol=1e-12)


def test_grabbed_point_stays_under_the_cursor():
    rng = np.random.default_rng(0)
    for _ in range(20):
        cam = OrbitCamera(target=rng.normal(size=3), distance=rng.uniform(2, 9),
                          yaw=rng.uniform(-3, 3), pitch=rng.uniform(-1.3, 1.3))
        center = cam.target + rng.normal(size=3) * 0.5
        start = cam.project(center, W, H)
        current = start + rng.uniform(-150, 150, size=2)
        move = np.array(gesture.grab(cam, center, 1.0, start, current, W, H)["move"])
        assert move @ cam.view_axis() == pytest.approx(0.0, abs=1e-9)  # in the view plane
        np.testing.assert_allclose(cam.project(center + move, W, H), current, atol=1e-7)


def test_twist_hand_checked():
    cam = front_camera()
    p = gesture.twist(cam, [0, 0, 0], 1.0, (400, 300), (490, 250), 800)
    # 90 px right in an 800-wide window at 180 degrees per window width: 20.25 degrees (by
    # hand); the axis is the view axis (0, 0, -1).
    assert p["degrees"] == pytest.approx(20.25)
    np.testing.assert_allclose(p["axis"], [0, 0, -1])
    # Right-hand rule (scipy's rotation vectors): turning +X by +90 degrees about -Z gives -Y,
    # i.e. from screen right to screen down: clockwise on screen for a rightward drag.
    turned = Rotation.from_rotvec(np.radians(90) * np.array(p["axis"])).apply([1, 0, 0])
    np.testing.assert_allclose(turned, [0, -1, 0], atol=1e-12)
    left = gesture.twist(cam, [0, 0, 0], 1.0, (400, 300), (380, 300), 800, degrees_per_width=800)
    assert left["degrees"] == pytest.approx(-20.0)
    # The same share of a wider window turns the same angle.
    wide = gesture.twist(cam, [0, 0, 0], 1.0, (800, 300), (980, 250), 1600)
    assert wide["degrees"] == pytest.approx(p["degrees"])


def test_twist_about_the_normal_points_into_the_screen():
    cam = front_camera()
    # A normal facing the viewer (+Z) is turned to point into the screen (-Z).
    p = gesture.twist(cam, [0, 0, 0], 1.0, (0, 0), (10, 0), 800, normal=[0, 1.2, 1.6])
    np.testing.assert_allclose(p["axis"], [0, -0.6, -0.8])
    p = gesture.twist(cam, [0, 0, 0], 1.0, (0, 0), (10, 0), 800, normal=[1, 0, -1])
    np.testing.assert_allclose(p["axis"], [math.sqrt(0.5), 0, -math.sqrt(0.5)])


def test_scale_hand_checked():
    p = gesture.scale([1, 2, 3], 0.7, (10, 10), (50, 110))
    assert p == {"kind": "scale", "center": [1.0, 2.0, 3.0], "radius": 0.7, "factor": pytest.approx(math.exp(0.5))}
    assert gesture.scale([0, 0, 0], 1, (0, 0), (0, -100), per_pixel=0.01)["factor"] == pytest.approx(math.exp(-1))
    assert gesture.scale([0, 0, 0], 1, (0, 0), (200, 0))["factor"] == 1.0


def test_pinch_hand_checked():
    cam = front_camera()
    p = gesture.pinch(cam, [0, 0, 0], 1.0, (100, 100), (130, 140))
    g = np.array(p["gradient"])
    # Drag (30, 40): length 50, strength 0.002 * 50 = 0.1, direction (0.6, 0.8, 0) in world.
    expected = 0.1 * np.array([[0.36 - 1 / 3, 0.48, 0], [0.48, 0.64 - 1 / 3, 0], [0, 0, -1 / 3]])
    np.testing.assert_allclose(g, expected, atol=1e-15)
    assert np.trace(g) == pytest.approx(0.0, abs=1e-15)
    np.testing.assert_allclose(g, g.T)
    inv = np.array(gesture.pinch(cam, [0, 0, 0], 1.0, (100, 100), (130, 140), invert=True)["gradient"])
    np.testing.assert_allclose(inv, -expected, atol=1e-15)
    zero = gesture.pinch(cam, [0, 0, 0], 1.0, (5, 5), (5, 5))
    assert zero["gradient"] == [[0.0] * 3] * 3


def test_pinch_direction_follows_a_turned_camera():
    cam = OrbitCamera(distance=4.0, yaw=math.radians(90))
    # Hand-checked: at yaw 90 degrees the eye sits on +X, so screen right is world -Z.
    g = np.array(gesture.pinch(cam, [0, 0, 0], 1.0, (0, 0), (100, 0))["gradient"])
    np.testing.assert_allclose(g, 0.2 * (np.diag([0, 0, 1.0]) - np.eye(3) / 3), atol=1e-12)


def test_params_are_json_ready_and_dispatch():
    cam = front_camera()
    for kind in gesture.KINDS:
        p = gesture.drag_params(kind, cam, np.array([0.0, 0.1, 0.2]), 0.3, (300, 300), (320, 330), W, H)
        assert p["kind"] == kind
        assert json.loads(json.dumps(p)) == p
    with pytest.raises(ValueError, match="kind"):
        gesture.drag_params("smear", cam, [0, 0, 0], 1, (0, 0), (1, 1), W, H)


def test_radius_rules():
    assert gesture.wheel_radius(1.0, 2) == pytest.approx(1.21)
    assert gesture.wheel_radius(1.0, -1) == pytest.approx(1 / 1.1)
    assert gesture.wheel_radius(1.0, 50, max_radius=3.0) == 3.0
    assert gesture.wheel_radius(1.0, -50, min_radius=0.1) == 0.1
    cam = front_camera()
    r = gesture.radius_from_pixels(cam, [0, 0, 0], 60, H)
    assert r == pytest.approx(60 * world_per_pixel(5.0))
    assert gesture.pixels_from_radius(cam, [0, 0, 0], r, H) == pytest.approx(60)
    # The outline radius matches the projected distance of a point one radius to the right.
    edge = cam.project([r, 0, 0], W, H)
    assert edge[0] - W / 2 == pytest.approx(60)


def test_bad_input():
    cam = front_camera()
    with pytest.raises(ValueError, match="radius"):
        gesture.grab(cam, [0, 0, 0], 0, (0, 0), (1, 1), W, H)
    with pytest.raises(ValueError, match="center"):
        gesture.scale([0, 0], 1, (0, 0), (1, 1))
    with pytest.raises(ValueError, match="current"):
        gesture.twist(cam, [0, 0, 0], 1, (0, 0), (1, np.nan), 800)
    with pytest.raises(ValueError, match="normal"):
        gesture.twist(cam, [0, 0, 0], 1, (0, 0), (1, 1), 800, normal=[0, 0, 0])
    with pytest.raises(ValueError, match="center"):
        gesture.radius_from_pixels(cam, [0, 0, 9], 10, H)  # behind the eye
    with pytest.raises(ValueError, match="steps"):
        gesture.wheel_radius(1.0, math.inf)
