"""Tests of the four brushes in `brushes.brush`: normalization, closed-form Jacobians, frame
indifference, reach, Lipschitz bounds, the `out=` and float32 paths, and argument checking.

[dGJ17] is F. de Goes and D. L. James, "Regularized Kelvinlets: Sculpting Brushes based on
Fundamental Solutions of Elasticity", ACM Trans. Graph. 36(4), 2017.
"""
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.linalg import logm
from scipy.spatial.transform import Rotation

import brushes

FALLOFFS = ("wide", "medium", "tight")
KINDS = ("grab", "twist", "scale", "pinch")
PINCH_G = np.array([[0.2, 0.1, -0.3], [0.1, -0.5, 0.05], [-0.3, 0.05, 0.3]])


def cross_matrix(v):
    """[v]x written out by hand; checked against np.cross in `test_twist_center_jacobian`."""
    return np.array([[0.0, -v[2], v[1]], [v[2], 0.0, -v[0]], [-v[1], v[0], 0.0]])


def unit_rows(rng, n):
    d = rng.normal(size=(n, 3))
    return d / np.linalg.norm(d, axis=1)[:, None]


DEFAULT = object()


def make(kind, *, center=(0.3, -0.2, 0.5), radius=0.7, falloff="wide", poisson=DEFAULT):
    extra = {} if poisson is DEFAULT else {"poisson": poisson}
    if kind == "grab":
        return brushes.Grab(center, radius, (0.3, -0.5, 0.2), falloff=falloff, **extra)
    if kind == "twist":
        return brushes.Twist(center, radius, (0.3, 1.0, -0.4), 25.0, falloff=falloff, **extra)
    if kind == "scale":
        return brushes.Scale(center, radius, 1.3, falloff=falloff, **extra)
    return brushes.Pinch(center, radius, PINCH_G, falloff=falloff, **extra)


def poissons(kind):
    return (-0.6, 0.0, 0.3, 0.45) if kind == "scale" else (-0.6, 0.0, 0.3, 0.5)


def fd_jacobian(fn, pts, h):
    """Fourth-order central differences (common practice): J[:, :, b] ~ (u(-2h) - 8u(-h) + 8u(h) - u(2h)) / 12h."""
    J = np.empty((len(pts), 3, 3))
    for b in range(3):
        e = np.zeros(3)
        e[b] = h
        J[:, :, b] = (fn(pts - 2 * e) - 8 * fn(pts - e) + 8 * fn(pts + e) - fn(pts + 2 * e)) / (12 * h)
    return J


def dense_points(center, radius, n_dirs=250):
    # Fibonacci sphere directions times radii concentrated where the gradient peaks (r < 3 radius).
    k = np.arange(n_dirs) + 0.5
    phi, z = math.pi * (1 + 5**0.5) * k, 1 - 2 * k / n_dirs
    d = np.stack([np.sqrt(1 - z * z) * np.cos(phi), np.sqrt(1 - z * z) * np.sin(phi), z], 1)
    radii = np.concatenate([[0.0], np.linspace(0.005, 3.0, 150), np.geomspace(3.0, 30.0, 15)[1:]]) * radius
    return np.asarray(center) + (radii[:, None, None] * d[None]).reshape(-1, 3)


# --------------------------------------------------------------------------------------------
# 10. Normalization at the centre
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize("falloff", FALLOFFS)
def test_grab_moves_its_center_by_move(falloff):
    for poisson in (-0.9, 0.0, 0.3, 0.5):
        g = brushes.Grab((1.0, -2.0, 0.5), 0.4, (0.3, -0.7, 1.1), poisson=poisson, falloff=falloff)
        np.testing.assert_allclose(g.displacement([[1.0, -2.0, 0.5]])[0], [0.3, -0.7, 1.1], rtol=1e-14, atol=1e-15)


@pytest.mark.parametrize("falloff", FALLOFFS)
def test_twist_center_jacobian(falloff):
    rng = np.random.default_rng(1)
    for poisson in (-0.9, 0.0, 0.5):
        axis = rng.normal(size=3) * 3.0
        t = brushes.Twist((0.2, 0.1, -0.3), 0.5, axis, 37.0, poisson=poisson, falloff=falloff)
        J = t.jacobian([[0.2, 0.1, -0.3]])[0]
        unit = axis / np.linalg.norm(axis)
        np.testing.assert_allclose(J, math.radians(37.0) * cross_matrix(unit), atol=1e-15)
        # right-hand rule: J v is the angular velocity crossed with v (numpy's cross product)
        for v in np.eye(3):
            np.testing.assert_allclose(J @ v, np.cross(math.radians(37.0) * unit, v), atol=1e-15)


@pytest.mark.parametrize("falloff", FALLOFFS)
def test_scale_center_jacobian(falloff):
    for poisson in (-0.9, 0.0, 0.3, 0.49):
        for factor in (0.5, 1.0, 2.5):
            s = brushes.Scale((0, 1, 2), 0.8, factor, poisson=poisson, falloff=falloff)
            np.testing.assert_allclose(s.jacobian([[0, 1, 2]])[0], (factor - 1) * np.eye(3), atol=1e-15)


@pytest.mark.parametrize("falloff", FALLOFFS)
def test_pinch_center_jacobian(falloff):
    for poisson in (-0.9, 0.0, 0.5):
        p = brushes.Pinch((0, 1, 2), 0.8, PINCH_G, poisson=poisson, falloff=falloff)
        np.testing.assert_allclose(p.jacobian([[0, 1, 2]])[0], PINCH_G, atol=1e-15)


@pytest.mark.parametrize("falloff", FALLOFFS)
def test_pinch_whose_trace_is_round_off_stays_finite(falloff):
    # diag(0.3, -0.4, 0.1) is traceless, but its floating-point trace is -2.8e-17 (hand-checked:
    # 0.3 + -0.4 = -0.10000000000000003). The constructor accepts it (|trace| < 1e-9); the round-off
    # isotropic part must not be divided by the scale constant, which is 0 at the default poisson 0.5.
    G = np.diag([0.3, -0.4, 0.1])
    assert np.trace(G) != 0.0
    for poisson in (0.3, 0.5):
        p = brushes.Pinch((0, 0, 0), 1.0, G, poisson=poisson, falloff=falloff)
        pts = np.array([[0.0, 0.0, 0.0], [0.1, 0.2, 0.3], [1.0, -2.0, 0.5]])
        assert np.all(np.isfinite(p.displacement(pts))), poisson
        np.testing.assert_allclose(p.jacobian(pts[:1])[0], G, atol=1e-15)


# --------------------------------------------------------------------------------------------
# 5. A small twist near its centre is a rotation
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize("falloff", FALLOFFS)
def test_twist_is_a_small_rotation_near_its_center(falloff):
    rng = np.random.default_rng(2)
    axis = unit_rows(rng, 1)[0]
    center, eps = np.array([0.3, 0.1, -0.2]), 0.5
    for degrees in (0.5, 0.05):
        theta = math.radians(degrees)
        rot = Rotation.from_rotvec(theta * axis)  # scipy: right-hand rotation by |rotvec| radians
        t = brushes.Twist(center, eps, axis, degrees, falloff=falloff)
        # the Jacobian at the centre is the generator log(R) of the rotation (scipy.linalg.logm)
        np.testing.assert_allclose(t.jacobian(center[None])[0], logm(rot.as_matrix()).real, atol=1e-14)
        for rel in (1e-3, 3e-2):
            x = rel * eps * unit_rows(rng, 30)
            err = np.linalg.norm(t.displacement(center + x) - (rot.apply(x) - x), axis=1) / (rel * eps)
            # rotation: R x - x = theta a x x + O(theta^2 |x|); the twist profile w(r)/w(0) = 1 - O((r/eps)^2)
            # (hand expansion: 1 - 2.1 (r/eps)^2 for "wide"), so |error| / |x| = O(theta^2 + theta (r/eps)^2).
            assert err.max() <= theta**2 + 10 * theta * rel**2, (degrees, rel, err.max())


# --------------------------------------------------------------------------------------------
# 6. Closed-form Jacobians against finite differences
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize("falloff", FALLOFFS)
@pytest.mark.parametrize("kind", KINDS)
def test_jacobian_matches_finite_differences(kind, falloff):
    rng = np.random.default_rng(3)
    for poisson in poissons(kind):
        b = make(kind, falloff=falloff, poisson=poisson)
        pts = b.center + unit_rows(rng, 40) * rng.uniform(0.0, 6.0, size=(40, 1)) * b.radius
        J = b.jacobian(pts)
        assert J.shape == (40, 3, 3) and J.dtype == np.float64
        ref = fd_jacobian(b.displacement, pts, 1e-3 * b.radius)
        np.testing.assert_allclose(J, ref, rtol=0, atol=1e-9 * np.abs(ref).max())


# --------------------------------------------------------------------------------------------
# 9. Frame indifference
# --------------------------------------------------------------------------------------------
def build(kind, center, radius, params, falloff, poisson):
    if kind == "grab":
        return brushes.Grab(center, radius, params, poisson=poisson, falloff=falloff)
    if kind == "twist":
        return brushes.Twist(center, radius, params, 40.0, poisson=poisson, falloff=falloff)
    if kind == "scale":
        return brushes.Scale(center, radius, 1.4, poisson=min(poisson, 0.45), falloff=falloff)
    return brushes.Pinch(center, radius, params, poisson=poisson, falloff=falloff)


@settings(max_examples=30, deadline=None)
@given(kind=st.sampled_from(KINDS), falloff=st.sampled_from(FALLOFFS), seed=st.integers(0, 2**32 - 1),
       radius=st.floats(0.05, 5.0), poisson=st.floats(-0.95, 0.5))
def test_rotating_and_translating_brush_and_points_rotates_the_field(kind, falloff, seed, radius, poisson):
    # Objectivity of linear isotropic elasticity: u'(R x + t) = R u(x) and J' = R J R^T for a brush
    # whose centre, move/axis and gradient are carried along (rotation from scipy's Rotation.random).
    rng = np.random.default_rng(seed)
    rot = Rotation.random(random_state=seed)
    R = rot.as_matrix()
    shift = rng.uniform(-10, 10, size=3)
    center = rng.uniform(-3, 3, size=3)
    if kind == "pinch":
        # symmetric with a trace of exactly 0.0 (last diagonal entry set from the other two), so this
        # test is not about the round-off trace case of test_pinch_whose_trace_is_round_off_stays_finite
        A = rng.normal(size=(3, 3))
        params = A + A.T
        params[2, 2] = -(params[0, 0] + params[1, 1])
        moved = R @ params @ R.T
        moved = 0.5 * (moved + moved.T)
        moved[2, 2] = -(moved[0, 0] + moved[1, 1])
    else:
        params = rng.normal(size=3)
        moved = R @ params
    b = build(kind, center, radius, params, falloff, poisson)
    b2 = build(kind, rot.apply(center) + shift, radius, moved, falloff, poisson)
    pts = center + unit_rows(rng, 25) * rng.uniform(0, 4 * radius, size=(25, 1))
    pts2 = rot.apply(pts) + shift
    u, u2 = b.displacement(pts), b2.displacement(pts2)
    np.testing.assert_allclose(u2, u @ R.T, rtol=0, atol=1e-9 * np.abs(u).max())
    J, J2 = b.jacobian(pts), b2.jacobian(pts2)
    np.testing.assert_allclose(J2, R @ J @ R.T, rtol=0, atol=1e-9 * np.abs(J).max())


# --------------------------------------------------------------------------------------------
# 11. out=, float32 input, Grab.response
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize("kind", KINDS)
def test_out_float32_and_params(kind):
    rng = np.random.default_rng(4)
    b = make(kind, falloff="medium")
    pts = b.center + rng.normal(size=(50, 3))
    out = np.full((50, 3), np.nan)
    res = b.displacement(pts, out=out)
    assert res is out
    np.testing.assert_array_equal(out, b.displacement(pts))
    pts32 = pts.astype(np.float32)
    u32 = b.displacement(pts32)
    assert u32.dtype == np.float64 and u32.shape == (50, 3)
    # float32 points are the float64 numbers they round to
    np.testing.assert_array_equal(u32, b.displacement(pts32.astype(np.float64)))
    np.testing.assert_array_equal(b.jacobian(pts32), b.jacobian(pts32.astype(np.float64)))
    assert b.displacement(np.empty((0, 3))).shape == (0, 3)
    assert b.jacobian(np.empty((0, 3))).shape == (0, 3, 3)
    # lists are accepted like arrays
    np.testing.assert_array_equal(b.displacement(pts[:2].tolist()), b.displacement(pts[:2]))
    # the API contract: type(b)(**b.params()) rebuilds b
    again = type(b)(**b.params())
    assert again == b and again.kind == kind
    np.testing.assert_array_equal(again.displacement(pts), b.displacement(pts))


@pytest.mark.parametrize("falloff", FALLOFFS)
def test_grab_response_times_move_is_the_displacement(falloff):
    rng = np.random.default_rng(5)
    for poisson in (-0.5, 0.5):
        g = brushes.Grab((0.1, 0.2, 0.3), 0.6, (0.4, -0.1, 0.9), poisson=poisson, falloff=falloff)
        pts = g.center + rng.normal(size=(60, 3))
        K = g.response(pts)
        assert K.shape == (60, 3, 3) and K.dtype == np.float64
        u = g.displacement(pts)
        np.testing.assert_allclose(K @ g.move, u, rtol=0, atol=1e-14 * np.abs(u).max())
        np.testing.assert_allclose(g.response(pts.astype(np.float32)) @ g.move,
                                   g.displacement(pts.astype(np.float32)), rtol=0, atol=1e-14 * np.abs(u).max())
        # K depends on the centre, radius and material, not on move: a new drag reuses it
        g2 = brushes.Grab(g.center, 0.6, (-2.0, 0.5, 0.1), poisson=poisson, falloff=falloff)
        np.testing.assert_allclose(K @ g2.move, g2.displacement(pts), rtol=0, atol=1e-13 * np.abs(u).max())


# --------------------------------------------------------------------------------------------
# 12. reach
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize("falloff", FALLOFFS)
@pytest.mark.parametrize("kind", KINDS)
def test_field_is_below_tol_beyond_reach(kind, falloff):
    rng = np.random.default_rng(6)
    for poisson in (poissons(kind)[0], poissons(kind)[-1]):
        b = make(kind, falloff=falloff, poisson=poisson)
        peak = np.linalg.norm(b.displacement(dense_points(b.center, b.radius, 100)), axis=1).max()
        for rel in (1e-1, 1e-3, 1e-6):
            tol = rel * peak
            reach = b.reach(tol)
            assert 0 < reach < math.inf
            d = unit_rows(rng, 3000)
            dist = reach * np.exp(rng.uniform(0, math.log(100), size=(3000, 1)))
            dist[:300] = reach * (1 + 1e-9)  # just outside the reach
            u = np.linalg.norm(b.displacement(b.center + d * dist), axis=1)
            assert u.max() < tol, (rel, u.max() / tol)


# --------------------------------------------------------------------------------------------
# 13. lipschitz
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize("falloff", FALLOFFS)
@pytest.mark.parametrize("kind", KINDS)
def test_no_sampled_gradient_exceeds_lipschitz(kind, falloff):
    for poisson in (poissons(kind)[0], 0.2, poissons(kind)[-1]):
        b = make(kind, falloff=falloff, poisson=poisson)
        sup = np.linalg.norm(b.jacobian(dense_points(b.center, b.radius)), ord=2, axis=(1, 2)).max()
        assert sup <= b.lipschitz(), (poisson, sup / b.lipschitz())


def test_grab_wide_lipschitz_is_tight():
    # For the grab the table is the sampled maximum plus a 1% margin: a bound within 5% of the
    # densest sampling here is tight enough for the flow's step control to be efficient.
    rng = np.random.default_rng(7)
    for poisson in (-0.9, 0.0, 0.3, 0.5):
        g = brushes.Grab((1, 2, 3), 0.3, unit_rows(rng, 1)[0] * 0.2, poisson=poisson)
        sup = np.linalg.norm(g.jacobian(dense_points(g.center, g.radius)), ord=2, axis=(1, 2)).max()
        assert 0.95 * g.lipschitz() <= sup <= g.lipschitz(), (poisson, sup / g.lipschitz())


# --------------------------------------------------------------------------------------------
# 14. Bad input
# --------------------------------------------------------------------------------------------
def starts(name):
    return rf"^{name}\b"


def test_defaults_are_valid():
    assert brushes.Grab((0, 0, 0), 1, (1, 0, 0)).poisson == 0.5
    assert brushes.Twist((0, 0, 0), 1, (0, 0, 1), 10).poisson == 0.5
    assert brushes.Scale((0, 0, 0), 1, 1.2).poisson == 0.3
    assert brushes.Pinch((0, 0, 0), 1, np.diag([1.0, -1.0, 0.0])).poisson == 0.5
    for kind in KINDS:
        assert make(kind).falloff == "wide"


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("radius", [0, -1.0, float("nan"), float("inf"), "wide", None, True])
def test_bad_radius(kind, radius):
    with pytest.raises(ValueError, match=starts("radius")):
        make(kind, radius=radius)


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("center", [(float("nan"), 0, 0), (0, float("inf"), 0), (0, 0), (0, 0, 0, 0),
                                    [[0, 0, 0]], "abc", None, [[0, 1], [2]]])
def test_bad_center(kind, center):
    with pytest.raises(ValueError, match=starts("center")):
        make(kind, center=center)


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("poisson", [-1.0, -1.5, 0.6, float("nan"), float("inf"), "soft", None])
def test_bad_poisson(kind, poisson):
    with pytest.raises(ValueError, match=starts("poisson")):
        make(kind, poisson=poisson)


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("falloff", ["soft", "Wide", None, 3, ["wide"]])
def test_bad_falloff(kind, falloff):
    with pytest.raises(ValueError, match=starts("falloff")):
        make(kind, falloff=falloff)


@pytest.mark.parametrize("move", [(float("nan"), 0, 0), (0, 0, float("-inf")), (1, 2), (1, 2, 3, 4), "up", None])
def test_bad_move(move):
    with pytest.raises(ValueError, match=starts("move")):
        brushes.Grab((0, 0, 0), 1, move)


@pytest.mark.parametrize("axis", [(0, 0, 0), (float("nan"), 0, 1), (0, float("inf"), 0), (0, 1), "z", None])
def test_bad_axis(axis):
    with pytest.raises(ValueError, match=starts("axis")):
        brushes.Twist((0, 0, 0), 1, axis, 10)


@pytest.mark.parametrize("degrees", [float("nan"), float("inf"), "ten", None])
def test_bad_degrees(degrees):
    with pytest.raises(ValueError, match=starts("degrees")):
        brushes.Twist((0, 0, 0), 1, (0, 0, 1), degrees)


@pytest.mark.parametrize("factor", [0, -0.5, float("nan"), float("inf"), "big", None])
def test_bad_factor(factor):
    with pytest.raises(ValueError, match=starts("factor")):
        brushes.Scale((0, 0, 0), 1, factor)


def test_scale_refuses_an_incompressible_material():
    with pytest.raises(ValueError, match=starts("poisson")) as info:
        brushes.Scale((0, 0, 0), 1, 1.5, poisson=0.5)
    assert "incompressible" in str(info.value) and "cannot change volume" in str(info.value)


@pytest.mark.parametrize("gradient", [
    np.array([[0, 1, 0], [0, 0, 0], [0, 0, 0.0]]),        # not symmetric
    np.diag([1.0, 1.0, 0.0]),                              # not traceless
    np.diag([float("nan"), 0, 0]),                         # not finite
    np.diag([float("inf"), -float("inf"), 0]),
    np.zeros(3), np.zeros((2, 2)), np.zeros((3, 3, 1)), "pinch", None, [[1, 0], [0, -1, 0], [0, 0, 0]],
])
def test_bad_gradient(gradient):
    with pytest.raises(ValueError, match=starts("gradient")):
        brushes.Pinch((0, 0, 0), 1, gradient)


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("points", [np.zeros(3), np.zeros((4, 2)), np.zeros((4, 4)), np.zeros((2, 3, 3)), "xyz"])
def test_bad_points(kind, points):
    b = make(kind)
    calls = [b.displacement, b.jacobian] + ([b.response] if kind == "grab" else [])
    for call in calls:
        with pytest.raises(ValueError, match=starts("points")):
            call(points)


@pytest.mark.parametrize("kind", KINDS)
def test_bad_out_and_tol(kind):
    b = make(kind)
    pts = np.zeros((4, 3))
    for out in (np.zeros((3, 3)), np.zeros((4, 3), dtype=np.float32), np.zeros((3, 4)).T, [[0.0] * 3] * 4):
        with pytest.raises(ValueError, match=starts("out")):
            b.displacement(pts, out=out)
    for tol in (0, -1.0, float("nan"), float("inf")):
        with pytest.raises(ValueError, match=starts("tol")):
            b.reach(tol)


def test_kernel_load_rebuilds_the_displacement():
    # `Brush.kernel_load` names the one regularized load of each built-in brush (what the
    # elastodynamic response is built from): fed back to the kernels it gives the displacement.
    from brushes import kernels
    rng = np.random.default_rng(31)
    x = rng.normal(scale=0.5, size=(300, 3))
    made = [brushes.Grab([0.1, 0.0, -0.2], 0.3, [0.2, -0.1, 0.05], falloff="medium"),
            brushes.Twist([0.0, 0.2, 0.1], 0.4, [1.0, 1.0, 0.0], 50.0, falloff="tight"),
            brushes.Scale([0.0, 0.0, 0.0], 0.3, 1.5, poisson=0.2),
            brushes.Pinch([0.1, 0.1, 0.1], 0.35, [[0.3, 0.1, 0.0], [0.1, -0.3, 0.0], [0.0, 0.0, 0.0]])]
    for b in made:
        load = b.kernel_load()
        fn = kernels.grab_displacement if load.kind == "grab" else kernels.affine_displacement
        u = fn(x, load.center, load.load, load.eps, load.weights, load.beta)
        np.testing.assert_allclose(u, b.displacement(x), rtol=0, atol=1e-15 * np.abs(u).max())

    class MyGrab(brushes.Grab):
        pass

    assert MyGrab([0, 0, 0], 0.3, [0.1, 0, 0]).kernel_load() is None  # its field may differ
    assert brushes.mirror(made[0], [1, 0, 0]).kernel_load() is None
