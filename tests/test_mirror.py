"""Tests for brushes.mirror: a brush acting together with its reflection across a plane.

The reflection R(x) = x - 2 ((x - p) . n) n and its matrix H = I - 2 n n^T are computed here,
independently of the module. Outside references: the isotropy of the Kelvinlet formula
(de Goes & James 2017, eq. 9: built from r, r r^T and the load only), hand-worked cases,
and Liouville's formula for the flow's determinant.
"""
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import brushes

SETTINGS = settings(max_examples=25, deadline=None)

# a tilted plane through an offset point
NORMAL = np.array([1.0, 2.0, -0.7])
POINT = np.array([0.3, -0.2, 0.5])


def unit(v):
    v = np.asarray(v, dtype=np.float64)
    return v / np.linalg.norm(v)


def traceless(a, b, d, e, f):
    """Symmetric traceless 3x3 [[a, d, e], [d, b, f], [e, f, -(a + b)]]."""
    return np.array([[a, d, e], [d, b, f], [e, f, -(a + b)]], dtype=np.float64)


def householder(normal):
    n = unit(normal)
    return np.eye(3) - 2.0 * np.outer(n, n)


def reflect(x, normal, point):
    n = unit(normal)
    x = np.asarray(x, dtype=np.float64)
    return x - 2.0 * ((x - point) @ n)[..., None] * n


BRUSHES = {
    "grab": brushes.Grab([0.5, 0.1, 0.2], 0.6, [0.9, -0.3, 0.4]),
    "grab-tight-nu0.1": brushes.Grab([0.5, 0.1, 0.2], 0.6, [0.2, 0.5, -0.3], poisson=0.1, falloff="tight"),
    "twist": brushes.Twist([0.5, 0.1, 0.2], 0.6, [0.0, 1.0, 1.0], 400.0),
    "scale": brushes.Scale([0.5, 0.1, 0.2], 0.6, 2.5, falloff="medium"),
    "pinch": brushes.Pinch([0.5, 0.1, 0.2], 0.6, traceless(1.0, -0.5, 0.3, 0.0, 0.2)),
}


def points(seed=0, n=80):
    rng = np.random.default_rng(seed)
    return rng.normal(size=(n, 3)) * rng.choice([0.2, 1.0, 2.0], size=(n, 1))


# --- symmetry to round-off -------------------------------------------------------------------------


@pytest.mark.parametrize("name", list(BRUSHES))
def test_displacement_and_jacobian_are_symmetric(name):
    m = brushes.mirror(BRUSHES[name], NORMAL, POINT)
    H = householder(NORMAL)
    x = points()
    xr = reflect(x, NORMAL, POINT)
    u, ur = m.displacement(x), m.displacement(xr)
    scale = np.abs(u).max()
    # u(R x) = H u(x) (hand: the sum of a field and its mirror image is mirror-symmetric)
    np.testing.assert_allclose(ur, u @ H.T, rtol=0, atol=1e-13 * scale)
    J, Jr = m.jacobian(x), m.jacobian(xr)
    # J(R x) = H J(x) H (chain rule on u(R x) = H u(x), with R's linear part H)
    np.testing.assert_allclose(Jr, H @ J @ H, rtol=0, atol=1e-13 * max(1.0, np.abs(J).max()))


@pytest.mark.parametrize("flow", [False, True], ids=["linear", "flow"])
@pytest.mark.parametrize("name", list(BRUSHES))
def test_apply_is_symmetric(name, flow):
    m = brushes.mirror(BRUSHES[name], NORMAL, POINT)
    x = points(1)
    y = m.apply(x, flow=flow)
    yr = m.apply(reflect(x, NORMAL, POINT), flow=flow)
    # the posed mirror image is the mirror image of the posed points
    np.testing.assert_allclose(yr, reflect(y, NORMAL, POINT), rtol=0, atol=1e-12 * (1.0 + np.abs(y).max()))


@st.composite
def planes(draw):
    n = draw(st.tuples(*[st.floats(-1, 1)] * 3).filter(lambda v: np.linalg.norm(v) > 0.1))
    p = draw(st.tuples(*[st.floats(-2, 2)] * 3))
    return np.array(n), np.array(p)


@SETTINGS
@given(name=st.sampled_from(list(BRUSHES)), plane=planes(), flow=st.booleans(), seed=st.integers(0, 2**16))
def test_symmetry_for_random_planes(name, plane, flow, seed):
    normal, point = plane
    m = brushes.mirror(BRUSHES[name], normal, point)
    x = points(seed, n=20)
    xr = reflect(x, normal, point)
    y = m.apply(x, flow=flow)
    np.testing.assert_allclose(m.apply(xr, flow=flow), reflect(y, normal, point), rtol=0,
                               atol=1e-11 * (1.0 + np.abs(y).max()))
    np.testing.assert_allclose(m.displacement(xr), m.displacement(x) @ householder(normal).T, rtol=0,
                               atol=1e-12 * (1.0 + np.abs(y).max()))


# --- the reflected half is the reflected brush ----------------------------------------------------------


def reflected_brush(b, normal, point):
    """The mirror image of brush b, built by hand from its parameters.

    The Kelvinlet is an isotropic tensor field (eq. 9 uses only r, r r^T and the load), so a
    reflection maps a grab to the grab with reflected centre and move, a pinch to H G H, a scale
    to itself at the reflected centre, and a twist's axis (an axial vector) to -H axis.
    """
    H = householder(normal)
    c = reflect(b.center, normal, point)
    kw = {"poisson": b.poisson, "falloff": b.falloff}
    if b.kind == "grab":
        return brushes.Grab(c, b.radius, H @ b.move, **kw)
    if b.kind == "twist":
        return brushes.Twist(c, b.radius, -(H @ b.axis), b.degrees, **kw)
    if b.kind == "scale":
        return brushes.Scale(c, b.radius, b.factor, **kw)
    g = H @ b.gradient @ H
    return brushes.Pinch(c, b.radius, 0.5 * (g + g.T), **kw)


@pytest.mark.parametrize("name", list(BRUSHES))
def test_mirror_adds_the_reflected_brush(name):
    b = BRUSHES[name]
    m = brushes.mirror(b, NORMAL, POINT)
    r = reflected_brush(b, NORMAL, POINT)
    x = points(2)
    np.testing.assert_allclose(m.displacement(x), b.displacement(x) + r.displacement(x), rtol=0, atol=1e-12)
    np.testing.assert_allclose(m.jacobian(x), b.jacobian(x) + r.jacobian(x), rtol=0, atol=1e-11)


def test_grab_centre_on_the_plane_acts_twice():
    c = np.array([0.0, 0.4, -0.3])  # on the plane x = 0
    along = brushes.mirror(brushes.Grab(c, 0.5, [0.0, 0.3, 0.1]), [1.0, 0.0, 0.0])
    # hand: H move = move for a move in the plane, so u(c) = move + H move = 2 move
    np.testing.assert_allclose(along.displacement(c[None]), [[0.0, 0.6, 0.2]], rtol=0, atol=1e-15)
    across = brushes.mirror(brushes.Grab(c, 0.5, [0.3, 0.0, 0.0]), [1.0, 0.0, 0.0])
    # hand: H move = -move for a move along the normal, so the two halves cancel at c
    np.testing.assert_allclose(across.displacement(c[None]), [[0.0, 0.0, 0.0]], rtol=0, atol=1e-15)


@pytest.mark.parametrize("flow", [False, True], ids=["linear", "flow"])
@pytest.mark.parametrize("name", list(BRUSHES))
def test_points_on_the_plane_stay_on_it(name, flow):
    # hand: on the plane R x = x, so u = H u there and u has no normal component
    m = brushes.mirror(BRUSHES[name], NORMAL, POINT)
    n = unit(NORMAL)
    x = points(3, n=40)
    on_plane = x - ((x - POINT) @ n)[:, None] * n
    y = m.apply(on_plane, flow=flow)
    np.testing.assert_allclose((y - POINT) @ n, 0.0, rtol=0, atol=1e-12 * (1.0 + np.abs(y).max()))


# --- mirrored flows keep their guarantees ---------------------------------------------------------------


def _fd_det(brush, x, h):
    n = len(x)
    shifted = np.concatenate([x + h * e for e in np.eye(3)] + [x - h * e for e in np.eye(3)])
    y = brush.apply(shifted)
    F = np.stack([(y[k * n:(k + 1) * n] - y[(3 + k) * n:(4 + k) * n]) / (2 * h) for k in range(3)], axis=2)
    return np.linalg.det(F)


def _mirrored(kind, strength, plane, nu, c=np.array([0.4, 0.0, 0.1]), r=0.5):
    if kind == "grab":
        b = brushes.Grab(c, r, [5 * r * strength, 0.0, r * strength], poisson=nu)
    elif kind == "twist":
        b = brushes.Twist(c, r, [0.0, 1.0, 1.0], 1440.0 * strength, poisson=nu)
    elif kind == "pinch":
        b = brushes.Pinch(c, r, traceless(2.0 * strength, -1.0 * strength, strength, 0.0, 0.0), poisson=nu)
    else:
        b = brushes.Scale(c, r, 0.2 + 4.8 * strength, poisson=min(nu, 0.45))
    return brushes.mirror(b, *plane)


@SETTINGS
@given(kind=st.sampled_from(["grab", "twist", "pinch", "scale"]), strength=st.floats(0.1, 1.0),
       plane=planes(), nu=st.one_of(st.just(0.5), st.floats(-0.9, 0.45)), seed=st.integers(0, 2**16))
def test_mirrored_flows_never_fold(kind, strength, plane, nu, seed):
    m = _mirrored(kind, strength, plane, nu)
    x = m.brush.center + points(seed, n=10) * m.brush.radius
    assert _fd_det(m, x, 1e-5 * m.brush.radius).min() > 0.0  # a flow preserves orientation (Liouville)


@SETTINGS
@given(kind=st.sampled_from(["grab", "pinch"]), strength=st.floats(0.1, 0.25), plane=planes(),
       seed=st.integers(0, 2**16))
def test_mirrored_incompressible_flows_keep_volume(kind, strength, plane, seed):
    # twists are left to the two tests below: a mirrored twist runs on RK4, whose error grows
    # with the angle (test_flow.py::test_volume_accuracy_does_not_decay_with_strength)
    m = _mirrored(kind, strength, plane, 0.5)
    x = m.brush.center + points(seed, n=10) * m.brush.radius
    np.testing.assert_allclose(_fd_det(m, x, 1e-5 * m.brush.radius), 1.0, rtol=0, atol=1e-4)  # div u = 0


def _double_twist(degrees):
    """A twist whose axis is the plane's normal and whose centre lies on the plane: its mirror
    image is the same twist (an axial vector along the normal is kept), so the pair is one twist
    by 2 * degrees (hand reasoning)."""
    c, axis = np.array([0.4, 0.0, 0.1]), np.array([0.0, 1.0, 1.0])
    return brushes.mirror(brushes.Twist(c, 0.5, axis, degrees), axis, c), brushes.Twist(c, 0.5, axis, 2 * degrees)


def test_mirror_of_a_twist_about_the_normal_is_a_double_twist():
    mirrored, double = _double_twist(360.0)
    x = mirrored.brush.center + points(11, n=100) * 0.5
    np.testing.assert_allclose(mirrored.displacement(x), double.displacement(x), rtol=0, atol=1e-13)
    # the double twist's flow is the closed-form rotation checked against scipy in test_flow
    ref = double.apply(x)
    motion = np.linalg.norm(ref - x, axis=1).max()
    assert np.abs(mirrored.apply(x) - ref).max() <= 1e-4 * motion  # measured 4.5e-5


def test_mirrored_double_twist_keeps_volume():
    # Symmetric twists near the plane are the common case. This pair runs on RK4 with N = 3 L
    # steps and det F - 1 grows with the angle: measured up to 1.2e-4 at 90 degrees, 2.5e-4 at 180,
    # 5.7e-4 at 360 (1.8e-4 at these points; the step-rule bug of
    # test_flow.py::test_volume_accuracy_does_not_decay_with_strength).
    mirrored, _ = _double_twist(180.0)
    x = mirrored.brush.center + points(12, n=100) * 0.5
    np.testing.assert_allclose(_fd_det(mirrored, x, 5e-6), 1.0, rtol=0, atol=1e-4)  # Liouville, nu = 1/2


# --- errors and bookkeeping -----------------------------------------------------------------------------


@pytest.mark.parametrize("normal,match", [
    ([0.0, 0.0, 0.0], r"^normal: must not be the zero vector"),
    ([1.0, 0.0], r"^normal: must be 3 numbers"),
    ([1.0, np.nan, 0.0], r"^normal: must be finite"),
    ("up", r"^normal:"),
])
def test_bad_normal(normal, match):
    with pytest.raises(ValueError, match=match):
        brushes.mirror(BRUSHES["grab"], normal)


@pytest.mark.parametrize("point,match", [
    ([0.0, 0.0], r"^point: must be 3 numbers"),
    ([0.0, np.inf, 0.0], r"^point: must be finite"),
])
def test_bad_point(point, match):
    with pytest.raises(ValueError, match=match):
        brushes.mirror(BRUSHES["grab"], [1.0, 0.0, 0.0], point)


def test_not_a_brush():
    with pytest.raises(ValueError, match=r"^brush: must be a Brush"):
        brushes.mirror({"kind": "grab"}, [1.0, 0.0, 0.0])


def test_params_name_the_plane_and_the_brush():
    b = BRUSHES["twist"]
    m = brushes.mirror(b, [0.0, 0.0, 2.0], [0.0, 0.0, 1.0])
    assert m.kind == "mirror"
    p = m.params()
    assert p["normal"] == [0.0, 0.0, 2.0] and p["point"] == [0.0, 0.0, 1.0]
    assert p["brush"]["kind"] == "twist"
    rebuilt = brushes.Twist(**{k: v for k, v in p["brush"].items() if k != "kind"})
    assert rebuilt == b


def test_mirrored_handles_keep_their_per_stage_bound():
    # The reflection x -> R x is an isometry, so |J_m| <= |J(x)| + |H J(Rx) H| <= 2 sup |J|
    # (triangle inequality; H orthogonal): the mirrored bound at t is twice the inner one at t.
    import brushes
    from brushes.flow import FlowStats, steps_for

    h = brushes.Handles([[0.6, 0.0, 0.0], [0.6, 0.8, 0.0]], 0.4, [[0.3, 0.2, 0.0], [0.0, 0.0, 0.0]])
    m = brushes.mirror(h, (1, 0, 0))
    for t in (0.0, 0.3, 0.5, 1.0):
        assert m.velocity_lipschitz_at(t) == 2.0 * h.velocity_lipschitz_at(t)
    pts = np.random.default_rng(3).normal(scale=0.5, size=(200, 3))
    stats = FlowStats()
    out = m.apply(pts, stats=stats)
    # at least the fold-free count for the bound at the start, never fewer (flow.steps_for)
    assert stats.steps >= steps_for(m.velocity_lipschitz_at(0.0))
    # symmetric across the plane, as every mirrored flow (u_m(R x) = H u_m(x))
    R = np.diag([-1.0, 1.0, 1.0])
    np.testing.assert_allclose(m.apply(pts @ R), out @ R, rtol=0, atol=1e-9)
