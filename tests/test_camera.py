import math

import numpy as np
import pytest

from viewer.camera import OrbitCamera, as_gl, look_at, perspective

W, H = 800, 600


def random_camera(rng):
    return OrbitCamera(
        target=rng.normal(size=3),
        distance=rng.uniform(0.5, 20),
        yaw=rng.uniform(-math.pi, math.pi),
        pitch=rng.uniform(-1.4, 1.4),
        fov_y=math.radians(rng.uniform(20, 90)),
    )


def glu_perspective_reference(fovy_degrees, aspect, z_near, z_far):
    # gluPerspective as printed in the OpenGL reference pages (GLU 1.3): f = cotangent(fovy/2),
    # [[f/aspect,0,0,0],[0,f,0,0],[0,0,(zFar+zNear)/(zNear-zFar),2*zFar*zNear/(zNear-zFar)],[0,0,-1,0]]
    f = 1.0 / math.tan(math.radians(fovy_degrees) / 2)
    return np.array([
        [f / aspect, 0, 0, 0],
        [0, f, 0, 0],
        [0, 0, (z_far + z_near) / (z_near - z_far), 2 * z_far * z_near / (z_near - z_far)],
        [0, 0, -1, 0],
    ])


def gl_frustum_reference(left, right, bottom, top, near, far):
    # glFrustum as printed in the OpenGL 2.1 reference pages: A=(r+l)/(r-l), B=(t+b)/(t-b),
    # C=-(f+n)/(f-n), D=-2fn/(f-n); [[2n/(r-l),0,A,0],[0,2n/(t-b),B,0],[0,0,C,D],[0,0,-1,0]]
    return np.array([
        [2 * near / (right - left), 0, (right + left) / (right - left), 0],
        [0, 2 * near / (top - bottom), (top + bottom) / (top - bottom), 0],
        [0, 0, -(far + near) / (far - near), -2 * far * near / (far - near)],
        [0, 0, -1, 0],
    ])


def window_from_matrices(cam, points, width, height):
    # clip = P V x; ndc = clip.xyz / clip.w; glViewport(0, 0, w, h) maps
    # x_w = (ndc_x + 1) w / 2, y_w = (ndc_y + 1) h / 2 (OpenGL reference page for glViewport).
    pv = cam.projection_matrix(width / height).astype(np.float64) @ cam.view_matrix().astype(np.float64)
    homo = np.c_[points, np.ones(len(points))] @ pv.T
    ndc = homo[:, :3] / homo[:, 3:]
    return np.c_[(ndc[:, 0] + 1) * width / 2, (ndc[:, 1] + 1) * height / 2], ndc[:, 2]


def test_projection_matches_glu_perspective_and_gl_frustum():
    for fovy, aspect, n, f in [(45, 4 / 3, 0.1, 100), (60, 1.0, 1.0, 10), (30, 16 / 9, 0.01, 5)]:
        ours = perspective(math.radians(fovy), aspect, n, f)
        assert ours.dtype == np.float32 and ours.shape == (4, 4)
        np.testing.assert_allclose(ours, glu_perspective_reference(fovy, aspect, n, f), rtol=1e-6)
        top = n * math.tan(math.radians(fovy) / 2)
        frustum = gl_frustum_reference(-top * aspect, top * aspect, -top, top, n, f)
        np.testing.assert_allclose(ours, frustum, rtol=1e-6, atol=1e-7)


def test_camera_projection_uses_its_clip_planes():
    cam = OrbitCamera(distance=4.0, fov_y=math.radians(50))
    np.testing.assert_allclose(
        cam.projection_matrix(1.5), glu_perspective_reference(50, 1.5, 0.04, 400.0), rtol=1e-6
    )


def test_view_matrix_is_rigid_and_maps_eye_and_target():
    rng = np.random.default_rng(1)
    for _ in range(20):
        cam = random_camera(rng)
        v = cam.view_matrix().astype(np.float64)
        r = v[:3, :3]
        np.testing.assert_allclose(r @ r.T, np.eye(3), atol=1e-6)
        assert np.linalg.det(r) == pytest.approx(1.0, abs=1e-5)
        np.testing.assert_array_equal(v[3], [0, 0, 0, 1])
        # gluLookAt: the eye goes to the origin and the target onto the -Z axis.
        np.testing.assert_allclose(v @ np.r_[cam.eye(), 1], [0, 0, 0, 1], atol=1e-4)
        np.testing.assert_allclose(v @ np.r_[cam.target, 1], [0, 0, -cam.distance, 1], atol=1e-4)
        # The frame vectors are the rows of the rotation (s, u, -f).
        np.testing.assert_allclose(r, [cam.right(), cam.up(), -cam.view_axis()], atol=1e-6)


def test_default_pose_looks_down_minus_z():
    cam = OrbitCamera(distance=5.0)
    # Hand-checked: yaw = pitch = 0 puts the eye on +Z; screen right is +X, up is +Y.
    np.testing.assert_allclose(cam.eye(), [0, 0, 5])
    np.testing.assert_allclose(cam.view_axis(), [0, 0, -1])
    np.testing.assert_allclose(cam.right(), [1, 0, 0])
    np.testing.assert_allclose(cam.up(), [0, 1, 0])
    origin, direction = cam.ray(W / 2, H / 2, W, H)
    np.testing.assert_allclose(direction, [0, 0, -1])
    # The top edge of the window is fov_y / 2 above the axis.
    _, d_top = cam.ray(W / 2, H, W, H)
    assert math.degrees(math.atan2(d_top[1], -d_top[2])) == pytest.approx(22.5)


def test_project_agrees_with_the_matrices():
    rng = np.random.default_rng(2)
    for _ in range(10):
        cam = random_camera(rng)
        pts = cam.target + rng.normal(size=(50, 3)) * cam.distance * 0.3
        pts = pts[(pts - cam.eye()) @ cam.view_axis() > cam.near]  # in front of the near plane
        ours = cam.project(pts, W, H)
        ref, _ = window_from_matrices(cam, pts, W, H)
        np.testing.assert_allclose(ours, ref, rtol=1e-4, atol=1e-2)


def test_ray_project_round_trip():
    rng = np.random.default_rng(3)
    for _ in range(20):
        cam = random_camera(rng)
        px, py = rng.uniform(0, W), rng.uniform(0, H)
        origin, direction = cam.ray(px, py, W, H)
        assert np.linalg.norm(direction) == pytest.approx(1.0)
        for t in (0.1, 1.0, 30.0):
            np.testing.assert_allclose(cam.project(origin + t * direction, W, H), [px, py], atol=1e-6)


def test_points_behind_the_eye_project_to_nan():
    cam = OrbitCamera(distance=2.0)
    out = cam.project([[0, 0, 0], [0, 0, 5]], W, H)
    assert np.all(np.isfinite(out[0])) and np.all(np.isnan(out[1]))


def test_frame_all_puts_the_box_in_view():
    rng = np.random.default_rng(4)
    for _ in range(20):
        cam = random_camera(rng)
        lo = rng.normal(size=3) * 10
        hi = lo + rng.uniform(0.01, 5, size=3)
        for width, height in [(W, H), (300, 900)]:
            cam.frame(lo, hi, aspect=width / height)
            corners = np.array([[x, y, z] for x in (lo[0], hi[0]) for y in (lo[1], hi[1]) for z in (lo[2], hi[2])])
            xy, ndc_z = window_from_matrices(cam, corners, width, height)
            assert np.all(xy >= 0) and np.all(xy <= [width, height])
            assert np.all((ndc_z > -1) & (ndc_z < 1))  # between the near and far planes
            # Tight: some corner sits on the 5% margin of the limiting side (the box fits,
            # not the sphere round it). Reference: the matrices' own projection above.
            half = np.array([width, height]) / 2
            reach = (np.abs(xy - half) / half).max()
            assert reach == pytest.approx(1 / 1.05, rel=1e-5)  # the matrices are float32


def test_a_tall_figure_fills_the_height():
    # Front view of a box 0.4 wide, 2 tall, 0.4 deep in an 800 x 600 window: its top edge
    # lands at the 5% margin, 600/2 + 300/1.05 = 585.7 (hand-computed); framing its bounding
    # sphere instead would leave it near 300 + 300 * 2 / (2 * 1.05 * 1.08) ~ 565 or lower.
    cam = OrbitCamera(yaw=0.0, pitch=0.0)
    lo, hi = np.array([-0.2, -1.0, -0.2]), np.array([0.2, 1.0, 0.2])
    cam.frame(lo, hi, aspect=800 / 600)
    corners = np.array([[x, y, z] for x in (lo[0], hi[0]) for y in (lo[1], hi[1]) for z in (lo[2], hi[2])])
    xy, _ = window_from_matrices(cam, corners, 800, 600)
    assert xy[:, 1].max() == pytest.approx(300 + 300 / 1.05, rel=1e-5)
    assert xy[:, 1].min() == pytest.approx(300 - 300 / 1.05, rel=1e-5)


def test_orbit_pan_zoom():
    cam = OrbitCamera(distance=4.0)
    cam.orbit(100, 0, radians_per_pixel=0.01)
    assert cam.yaw == pytest.approx(2 * math.pi - 1.0)
    cam.orbit(0, 1e6)
    assert cam.pitch > -math.pi / 2 and cam.pitch == pytest.approx(-(math.pi / 2 - 1e-3))
    cam = OrbitCamera(distance=4.0)
    before = cam.project([0.3, 0.2, 0.0], W, H)
    cam.pan(25, -10, H)
    # Hand-checked: a point at the target depth follows the drag exactly.
    np.testing.assert_allclose(cam.project([0.3, 0.2, 0.0], W, H), before + [25, -10], atol=1e-9)
    cam.zoom(2.0)
    assert cam.distance == pytest.approx(2.0)
    assert cam.near == pytest.approx(0.02) and cam.far == pytest.approx(200.0)


def test_moving_the_scene_moves_the_picture():
    # Invariance: translating target and points together leaves window coordinates unchanged.
    rng = np.random.default_rng(5)
    cam = random_camera(rng)
    pts = cam.target + rng.normal(size=(10, 3))
    before = cam.project(pts, W, H)
    shift = rng.normal(size=3) * 7
    cam.target = cam.target + shift
    np.testing.assert_allclose(cam.project(pts + shift, W, H), before, atol=1e-8)


def test_as_gl_is_column_major():
    m = np.arange(16.0).reshape(4, 4)
    assert as_gl(m)[:4] == (0.0, 4.0, 8.0, 12.0)


def test_bad_input():
    with pytest.raises(ValueError, match="distance"):
        OrbitCamera(distance=0)
    with pytest.raises(ValueError, match="target"):
        OrbitCamera(target=[1, 2])
    with pytest.raises(ValueError, match="fov_y"):
        OrbitCamera(fov_y=4.0)
    cam = OrbitCamera()
    with pytest.raises(ValueError, match="points"):
        cam.project(np.zeros((3, 2)), W, H)
    with pytest.raises(ValueError, match="width"):
        cam.ray(0, 0, 0, H)
    with pytest.raises(ValueError, match="factor"):
        cam.zoom(-1)
    with pytest.raises(ValueError, match="bounds_max"):
        cam.frame([0, 0, 0], [1, -1, 1])
    with pytest.raises(ValueError, match="up"):
        look_at([0, 0, 0], [0, 1, 0], [0, 1, 0])
    with pytest.raises(ValueError, match="far"):
        perspective(1.0, 1.0, 2.0, 1.0)


def test_lens_shift_moves_the_picture_and_keeps_rays_and_matrices_in_step():
    # An off-centre frustum: every projected point slides by shift * width / 2 window units,
    # the ray through a window point still passes through the world points projected there,
    # and the matrices (checked against the rays by the glViewport rule above) agree.
    rng = np.random.default_rng(9)
    cam = random_camera(rng)
    points = cam.target + rng.normal(size=(20, 3)) * 0.3
    plain = cam.project(points, W, H)
    cam.shift_x = 0.4
    shifted = cam.project(points, W, H)
    np.testing.assert_allclose(shifted[:, 0] - plain[:, 0], 0.4 * W / 2, atol=1e-9)
    np.testing.assert_allclose(shifted[:, 1], plain[:, 1], atol=1e-9)
    xy, _ = window_from_matrices(cam, points, W, H)
    np.testing.assert_allclose(xy, shifted, atol=2e-3)  # float32 matrices
    for p, (x, y) in zip(points, shifted):
        origin, direction = cam.ray(x, y, W, H)
        off = (p - origin) - ((p - origin) @ direction) * direction
        assert np.linalg.norm(off) < 1e-9
