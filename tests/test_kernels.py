"""Tests of the generated kernels (`brushes.kernels._generated`) and their entry points (`brushes.kernels`).

The physics is checked numerically, independently of the sympy proofs in `brushes.kernels.derive`:
finite differences of the numeric displacement must satisfy the Navier-Cauchy equations under the
published regularized load, and far away the grab must be Kelvin's point-load solution.
[dGJ17] is F. de Goes and D. L. James, "Regularized Kelvinlets: Sculpting Brushes based on
Fundamental Solutions of Elasticity", ACM Trans. Graph. 36(4), 2017.
"""
import json
import math
import os
import subprocess
import sys

import numpy as np
import pytest

import brushes
from brushes.kernels import _generated as gen
from brushes import kernels

RATIOS = {"wide": (1.0,), "medium": (1.0, 1.5), "tight": (1.0, 1.5, 2.25)}
FALLOFFS = tuple(RATIOS)
KINDS = ("grab", "twist", "scale", "pinch")
MU = 1.0  # the normalized brushes do not depend on mu; any shear modulus gives the same field


def hand_weights(ratios):
    # [dGJ17] sec. 5: far away each radius' profile is c0(r) + c1(r) eps^2 + ...; the weights
    # (w_0 = 1) cancel the first len-1 terms: sum_i w_i q_i^(2k) = 0. Solved here with numpy.
    n = len(ratios)
    M = np.array([[1.0] + [0.0] * (n - 1)] + [[q ** (2 * k) for q in ratios] for k in range(n - 1)])
    return np.linalg.solve(M, np.eye(n)[0])


def skew(v):
    return np.array([[0.0, -v[2], v[1]], [v[2], 0.0, -v[0]], [-v[1], v[0], 0.0]])


def unit_rows(rng, n):
    d = rng.normal(size=(n, 3))
    return d / np.linalg.norm(d, axis=1)[:, None]


def make(kind, center, radius, falloff, poisson):
    """A brush of `kind` and the centre gradient G it is normalized to (None for grab)."""
    if kind == "grab":
        return brushes.Grab(center, radius, (0.3, -0.5, 0.2), poisson=poisson, falloff=falloff), None
    if kind == "twist":
        axis = np.array([0.3, 1.0, -0.4]) / np.linalg.norm([0.3, 1.0, -0.4])
        return (brushes.Twist(center, radius, axis, 25.0, poisson=poisson, falloff=falloff),
                math.radians(25.0) * skew(axis))
    if kind == "scale":
        return brushes.Scale(center, radius, 1.3, poisson=poisson, falloff=falloff), 0.3 * np.eye(3)
    G = np.array([[0.2, 0.1, -0.3], [0.1, -0.5, 0.05], [-0.3, 0.05, 0.3]])
    return brushes.Pinch(center, radius, G, poisson=poisson, falloff=falloff), G


def second_derivatives(fn, pts, h):
    """H[n, a, b, c] = d^2 u_a / dx_b dx_c by fourth-order central differences of fn (n, 3) -> (n, 3)."""
    # Standard fourth-order stencils (common practice): f'' ~ (-1, 16, -30, 16, -1) / 12 h^2,
    # f' ~ (1, -8, 0, 8, -1) / 12 h, mixed derivatives as the product of two first-derivative stencils.
    d1 = {-2: 1 / 12, -1: -8 / 12, 1: 8 / 12, 2: -1 / 12}
    d2 = {-2: -1 / 12, -1: 16 / 12, 0: -30 / 12, 1: 16 / 12, 2: -1 / 12}
    E = np.eye(3) * h
    H = np.zeros((len(pts), 3, 3, 3))
    for b in range(3):
        H[:, :, b, b] = sum(c * fn(pts + k * E[b]) for k, c in d2.items()) / h**2
        for c in range(b + 1, 3):
            acc = sum(ci * cj * fn(pts + i * E[b] + j * E[c]) for i, ci in d1.items() for j, cj in d1.items())
            H[:, :, b, c] = H[:, :, c, b] = acc / h**2
    return H


# --------------------------------------------------------------------------------------------
# 1. Navier-Cauchy under the regularized loads
# --------------------------------------------------------------------------------------------
def paper_load(kind, rvec, radii, weights, poisson, G):
    """The body force b(x) (n, 3) that the normalized brush must balance ([dGJ17] eqs. 8, 9, sec. 4).

    rho_eps(r) = 15 eps^4 / (8 pi (r^2 + eps^2)^(7/2)) (eq. 8). The grab is the raw Kelvinlet
    u = K_eps f with f = move / K_eps(0), where K_eps(0) = [(a - b)/eps + a/(2 eps)] I (eq. 9 at r = 0).
    The affine brushes are u_i = d_k K_ij F_jk under b_i = F_ik d_k rho_eps (sec. 4), and
    J(0) = a c(eps) F with, by hand from eq. 9 (P = A'(s)/s, Q = b/a s^-3 at s = eps):
    twist (skew F) c = -5/(2 eps^3); scale (F = k I) c = 5 (2 beta - 1)/(2 eps^3);
    pinch (symmetric traceless F) c = (4 beta - 5)/(2 eps^3), with beta = 1/(4 (1 - nu)).
    """
    a = 1.0 / (4.0 * math.pi * MU)
    beta = 1.0 / (4.0 * (1.0 - poisson))
    rr = np.einsum("ij,ij->i", rvec, rvec)
    if kind == "grab":
        move = np.array([0.3, -0.5, 0.2])
        center = sum(w * a * ((1 - beta) / e + 1 / (2 * e)) for w, e in zip(weights, radii))
        rho = sum(w * 15 * e**4 / (8 * math.pi * (rr + e * e) ** 3.5) for w, e in zip(weights, radii))
        return rho[:, None] * (move / center)
    c = {"twist": lambda e: -2.5 / e**3, "scale": lambda e: 2.5 * (2 * beta - 1) / e**3,
         "pinch": lambda e: (4 * beta - 5) / (2 * e**3)}[kind]
    F = G / sum(w * a * c(e) for w, e in zip(weights, radii))
    # d_k rho = rho'(r) r_k / r = -7 * 15 eps^4 / (8 pi) (r^2 + eps^2)^(-9/2) r_k
    grad_rho = sum(w * (-105 * e**4 / (8 * math.pi)) * (rr + e * e) ** -4.5 for w, e in zip(weights, radii))
    return (grad_rho[:, None] * rvec) @ F.T


@pytest.mark.parametrize("falloff", FALLOFFS)
@pytest.mark.parametrize("kind", KINDS)
def test_navier_cauchy_residual_is_zero(kind, falloff):
    # mu lap u + (lambda + mu) grad div u + b = 0, lambda = 2 mu nu / (1 - 2 nu) ([dGJ17] eq. 1 and
    # sec. 3), evaluated by finite differences of the generated numeric displacement.
    rng = np.random.default_rng(11)
    center, eps = np.array([0.1, -0.2, 0.3]), 0.7
    radii, weights = eps * np.array(RATIOS[falloff]), hand_weights(RATIOS[falloff])
    for poisson in (-0.5, 0.0, 0.3, 0.45):
        brush, G = make(kind, center, eps, falloff, poisson)
        lam = 2 * MU * poisson / (1 - 2 * poisson)
        pts = center + unit_rows(rng, 20) * rng.uniform(0.05, 3.0, size=(20, 1)) * eps
        # h = eps/200: the stencils' h^4 truncation is ~1e-8 of the terms, round-off ~1e-9
        H = second_derivatives(brush.displacement, pts, 5e-3 * eps)
        lap = MU * np.einsum("nabb->na", H)
        graddiv = (lam + MU) * np.einsum("nbba->na", H)
        load = paper_load(kind, pts - center, radii, weights, poisson, G)
        # relative to the size of the three terms at each point, floored at 1% of their largest
        # size over the sample (near a point where all three vanish a relative error means nothing)
        size = np.maximum.reduce([np.linalg.norm(v, axis=1) for v in (lap, graddiv, load)])
        size = np.maximum(size, 1e-2 * size.max())
        resid = np.linalg.norm(lap + graddiv + load, axis=1) / size
        assert resid.max() < 2e-6, (poisson, resid.max())
        # the tolerance is tight enough to see a load wrong by 0.1%
        wrong = np.linalg.norm(lap + graddiv + 1.001 * load, axis=1) / size
        assert wrong.max() > 2e-6


def test_navier_cauchy_sees_the_wrong_material():
    # Control: the grab built for nu = 0.3 does not balance its load in a nu = 0.2 material.
    rng = np.random.default_rng(5)
    brush, _ = make("grab", np.zeros(3), 1.0, "wide", 0.3)
    pts = unit_rows(rng, 20) * rng.uniform(0.1, 2.0, size=(20, 1))
    H = second_derivatives(brush.displacement, pts, 1e-2)
    lam = 2 * MU * 0.2 / (1 - 2 * 0.2)
    res = MU * np.einsum("nabb->na", H) + (lam + MU) * np.einsum("nbba->na", H) \
        + paper_load("grab", pts, [1.0], [1.0], 0.3, None)
    assert np.linalg.norm(res, axis=1).max() > 1e-2 * np.linalg.norm(MU * np.einsum("nabb->na", H), axis=1).max()


# --------------------------------------------------------------------------------------------
# 2. Far field: Kelvin's point-load solution
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize("poisson", [-0.7, 0.0, 0.25, 0.4, 0.5])
def test_far_field_is_kelvins_solution(poisson):
    # Kelvin's solution for a point force f in an infinite isotropic solid:
    # u = [(3 - 4 nu) f + (n . f) n] / (16 pi mu (1 - nu) r). Landau & Lifshitz, Theory of
    # Elasticity, sec. 8 write it (from memory) as (1 + sigma)/(8 pi E (1 - sigma)) [(3 - 4 sigma) F
    # + n (F . n)] / r, the same with E = 2 mu (1 + sigma). The grab's raw load is
    # f = move / K_eps(0), K_eps(0) = [(a - b)/eps + a/(2 eps)] ([dGJ17] eq. 9 at r = 0).
    rng = np.random.default_rng(int(100 * (poisson + 1)))
    center, eps = np.array([1.0, 2.0, 3.0]), 0.3
    a, b = 1 / (4 * math.pi * MU), 1 / (4 * math.pi * MU) / (4 * (1 - poisson))
    for move in rng.normal(size=(3, 3)):
        brush = brushes.Grab(center, eps, move, poisson=poisson)
        f = move / ((a - b) / eps + a / (2 * eps))
        n = unit_rows(rng, 8)
        r = 1000 * eps
        kelvin = ((3 - 4 * poisson) * f + (n @ f)[:, None] * n) / (16 * math.pi * MU * (1 - poisson) * r)
        u = brush.displacement(center + r * n)
        np.testing.assert_allclose(u, kelvin, rtol=1e-5, atol=1e-5 * np.abs(kelvin).max())


# --------------------------------------------------------------------------------------------
# 7. Decay exponents of the falloffs
# --------------------------------------------------------------------------------------------
# grab: the profiles expand far away as c0(r) + c1(r) eps^2 + ..., each term 1/r^2 faster; the
# falloffs cancel eps^0 (medium) and eps^2 (tight) ([dGJ17] sec. 5): |u| ~ r^-1, r^-3, r^-5.
# affine: one more derivative, r^-2 (wide). Pinch: r^-4, r^-6.
# Twist and scale have no eps^2 term to begin with (hand expansion, x = eps^2/r^2):
# t^3 + (3/2) eps^2 t^5 = r^-3 [(1 - 3x/2 + ...) + 3x/2 (1 - ...)] = r^-3 (1 + 0 x - 15 x^2/8 + ...),
# and both profiles are multiples of it, so cancelling eps^0 already leaves eps^4 r^-7: r^-6 for
# both medium and tight.
DECAY = {
    ("grab", "wide"): -1, ("grab", "medium"): -3, ("grab", "tight"): -5,
    ("twist", "wide"): -2, ("twist", "medium"): -6, ("twist", "tight"): -6,
    ("scale", "wide"): -2, ("scale", "medium"): -6, ("scale", "tight"): -6,
    ("pinch", "wide"): -2, ("pinch", "medium"): -4, ("pinch", "tight"): -6,
}


@pytest.mark.parametrize("kind,falloff", list(DECAY))
def test_decay_exponent(kind, falloff):
    brush, _ = make(kind, np.zeros(3), 1.0, falloff, 0.3 if kind == "scale" else 0.5)
    n = unit_rows(np.random.default_rng(2), 6)
    near = np.linalg.norm(brush.displacement(100.0 * n), axis=1)
    far = np.linalg.norm(brush.displacement(1000.0 * n), axis=1)
    slope = np.log10(far / near)
    np.testing.assert_allclose(slope, DECAY[kind, falloff], atol=0.01)


# --------------------------------------------------------------------------------------------
# 4. Incompressibility at nu = 1/2
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize("falloff", FALLOFFS)
@pytest.mark.parametrize("kind", ["grab", "twist", "pinch"])
def test_incompressible_at_half(kind, falloff):
    # An incompressible material (nu = 1/2) only allows divergence-free displacements
    # (the limit lambda -> infinity of Navier-Cauchy; [dGJ17] sec. 3).
    rng = np.random.default_rng(4)
    brush, _ = make(kind, np.array([0.5, 0.0, -1.0]), 0.8, falloff, 0.5)
    pts = brush.center + unit_rows(rng, 200) * rng.uniform(0.0, 5.0, size=(200, 1))
    J = brush.jacobian(pts)
    div = np.trace(J, axis1=1, axis2=2)
    assert np.all(np.abs(div) <= 1e-12 * np.linalg.norm(J, axis=(1, 2)))
    if kind != "twist":  # control: a compressible material's grab and pinch change volume
        soft, _ = make(kind, brush.center, 0.8, falloff, 0.2)
        Js = soft.jacobian(pts)
        assert np.max(np.abs(np.trace(Js, axis1=1, axis2=2)) / np.linalg.norm(Js, axis=(1, 2))) > 1e-2


# --------------------------------------------------------------------------------------------
# 8. numba against numpy
# --------------------------------------------------------------------------------------------
CASES = [(kind, falloff, poisson) for kind in KINDS for falloff in FALLOFFS for poisson in (0.1, 0.45)]

SUBPROCESS = r"""
import json, sys
import numpy as np
from brushes import kernels
sys.path.insert(0, sys.argv[1])
from test_kernels import CASES, make, sample_points
out = {"backend": kernels.backend_name()}
pts = sample_points()
for kind, falloff, poisson in CASES:
    b, _ = make(kind, np.array([0.2, -0.1, 0.4]), 0.6, falloff, poisson)
    key = f"{kind}-{falloff}-{poisson}"
    out[key] = [b.displacement(pts).tolist(), b.jacobian(pts).tolist(),
                b.displacement(pts.astype(np.float32)).tolist(), b.jacobian(pts.astype(np.float32)).tolist()]
print(json.dumps(out))
"""


def sample_points():
    rng = np.random.default_rng(8)
    return np.array([0.2, -0.1, 0.4]) + unit_rows(rng, 300) * np.geomspace(1e-4, 30.0, 300)[:, None]


def test_numba_and_numpy_backends_agree():
    # The numba backend unrolls radii with fastmath; numpy evaluates the same sympy expressions
    # vectorized: they must agree to 1e-12 of the field's size (DEVELOPERS.md's design note).
    if kernels.backend_name() != "numba":
        pytest.skip("numba is not importable here, so there is no second backend to compare")
    env = dict(os.environ, PLIANT_BACKEND="numpy")
    proc = subprocess.run([sys.executable, "-c", SUBPROCESS, os.path.dirname(__file__)], env=env,
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    ref = json.loads(proc.stdout)
    assert ref.pop("backend") == "numpy"
    pts = sample_points()
    for kind, falloff, poisson in CASES:
        b, _ = make(kind, np.array([0.2, -0.1, 0.4]), 0.6, falloff, poisson)
        got = [b.displacement(pts), b.jacobian(pts), b.displacement(pts.astype(np.float32)),
               b.jacobian(pts.astype(np.float32))]
        for g, r in zip(got, ref[f"{kind}-{falloff}-{poisson}"]):
            r = np.array(r)
            assert g.dtype == np.float64 and g.shape == r.shape
            assert np.abs(g - r).max() <= 1e-12 * np.abs(r).max(), (kind, falloff, poisson)


def test_numba_kernels_match_numpy_kernels_directly():
    # The same comparison in one process through the generated functions themselves.
    if kernels.backend_name() != "numba":
        pytest.skip("numba is not importable here, so there is no second backend to compare")
    pts = sample_points()
    rng = np.random.default_rng(9)
    for falloff in FALLOFFS:
        eps, w = kernels.scales(falloff, 0.6)
        beta = kernels.beta_of(0.3)
        c, m, F = rng.normal(size=3), rng.normal(size=3), rng.normal(size=(3, 3))
        pairs = [(kernels.grab_displacement(pts, c, m, eps, w, beta),
                  gen.np_grab_displacement(pts, c, m, eps, w, beta, np.empty((len(pts), 3)))),
                 (kernels.grab_jacobian(pts, c, m, eps, w, beta),
                  gen.np_grab_jacobian(pts, c, m, eps, w, beta, np.empty((len(pts), 3, 3)))),
                 (kernels.affine_displacement(pts, c, F, eps, w, beta),
                  gen.np_affine_displacement(pts, c, F, eps, w, beta, np.empty((len(pts), 3)))),
                 (kernels.affine_jacobian(pts, c, F, eps, w, beta),
                  gen.np_affine_jacobian(pts, c, F, eps, w, beta, np.empty((len(pts), 3, 3))))]
        for got, ref in pairs:
            assert np.abs(got - ref).max() <= 1e-12 * np.abs(ref).max()


@pytest.fixture(params=["numba", "numpy"])
def one_backend(request, monkeypatch):
    """Run a test on each backend of the hand-written kernels (numpy as with PLIANT_BACKEND=numpy)."""
    if request.param == "numpy":
        monkeypatch.setenv("PLIANT_BACKEND", "numpy")
    elif kernels.numba_module() is None:
        pytest.skip("numba is not importable here")
    return request.param


def test_turn_about_axis_is_scipys_rotation(one_backend):
    # The twist's closed-form flow: each point turned about the axis by phi = v . c / |c|^2.
    # Outside reference: scipy's Rotation.from_rotvec (right-hand rule) applied point by point.
    from scipy.spatial.transform import Rotation
    rng = np.random.default_rng(21)
    center, axis = rng.normal(size=3), unit_rows(rng, 1)[0]
    pts = center + rng.normal(size=(500, 3))
    pts[:3] = center + np.outer([0.0, 1.5, -2.0], axis)  # on the axis (to rounding): they stay
    phi = rng.uniform(-3 * np.pi, 3 * np.pi, len(pts))
    r = pts - center
    velocity = phi[:, None] * np.cross(axis, r)
    got = kernels.turn_about_axis(pts, center, axis, velocity)
    expected = center + Rotation.from_rotvec(phi[:, None] * axis).apply(r)
    np.testing.assert_allclose(got, expected, rtol=0, atol=1e-13 * (1 + np.abs(pts).max()))
    np.testing.assert_allclose(got[:3], pts[:3], rtol=0, atol=1e-14 * (1 + np.abs(pts).max()))
    with pytest.raises(ValueError, match="velocity"):
        kernels.turn_about_axis(pts, center, axis, velocity[:-1])


def test_slide_along_rays_evaluates_scipys_spline(one_backend):
    # The scale's table flow: points slide along their rays by exp(s(log |r|)). Outside
    # reference: scipy's own CubicSpline evaluation of the same spline.
    from scipy.interpolate import CubicSpline
    knots = np.linspace(-3.0, 2.0, 41)
    spline = CubicSpline(knots, 0.3 * np.sin(2.0 * knots) + 0.1 * knots)
    rng = np.random.default_rng(22)
    center = rng.normal(size=3)
    dirs = unit_rows(rng, 400)
    logr = np.concatenate([rng.uniform(-2.99, 1.99, 396), [-5.0, -3.5, 2.5, 4.0]])
    pts = center + dirs * np.exp(logr)[:, None]
    pts[0] = center  # the centre itself stays
    got, far = kernels.slide_along_rays(pts, center, knots[0], knots[1] - knots[0], spline.c, 0.7)
    r = pts - center
    inside = (logr > -3.0) & (logr < 2.0)
    inside[0] = False
    expected = center + r[inside] * np.exp(spline(logr[inside]))[:, None]
    np.testing.assert_allclose(got[inside], expected, rtol=0, atol=1e-12 * np.abs(pts).max())
    np.testing.assert_allclose(got[[396, 397]], center + r[[396, 397]] * math.exp(0.7), rtol=1e-13)
    np.testing.assert_allclose(got[0], center, rtol=0, atol=0)
    assert far.tolist() == [False] * 398 + [True, True]  # past the last knot: left to the caller
    with pytest.raises(ValueError, match="coefficients"):
        kernels.slide_along_rays(pts, center, knots[0], 0.1, spline.c[:3], 0.7)


# --------------------------------------------------------------------------------------------
# 13. The tabulated gradient bounds
# --------------------------------------------------------------------------------------------
def test_gradient_bound_table_is_monotone():
    # The larger-neighbour rule of kernels.gradient_bound is only a bound if each row is monotone
    # in nu between samples (and the rule is checked on dense samples below).
    nus = np.array(gen.BOUND_NUS)
    assert nus[0] == -0.99 and nus[-1] == 0.5 and np.all(np.diff(nus) > 0)
    for kind, per in gen.GRADIENT_BOUNDS.items():
        assert set(per) == set(FALLOFFS)
        for falloff, vals in per.items():
            v = np.array(vals)
            assert v.shape == nus.shape and np.all(v > 0)
            step = np.diff(v)
            assert np.all(step >= 0) or np.all(step <= 0), (kind, falloff)
            if kind != "grab":  # affine rows barely move with nu: the 1% margin covers the ends
                assert v.max() / v.min() < 1.001


def unit_brush(kind, falloff, poisson, rng):
    """Radius 1, unit strength as the table defines it (|move| = 1, 1 radian, unit rate, unit |G|_F)."""
    if kind == "grab":
        return brushes.Grab((0, 0, 0), 1.0, unit_rows(rng, 1)[0], poisson=poisson, falloff=falloff)
    if kind == "twist":
        return brushes.Twist((0, 0, 0), 1.0, unit_rows(rng, 1)[0], math.degrees(1.0), poisson=poisson,
                             falloff=falloff)
    if kind == "scale":
        return brushes.Scale((0, 0, 0), 1.0, 2.0, poisson=min(poisson, 0.49), falloff=falloff)
    A = rng.normal(size=(3, 3))
    G = A + A.T
    G -= np.trace(G) / 3 * np.eye(3)
    G /= np.linalg.norm(G)
    G[2, 2] = -(G[0, 0] + G[1, 1])  # a round-off change making the trace exactly 0.0 (see test_brush)
    return brushes.Pinch((0, 0, 0), 1.0, G, poisson=poisson, falloff=falloff)


def dense_points():
    # Fibonacci sphere directions x geometric-then-linear radii: dense where the gradient peaks.
    k = np.arange(200) + 0.5
    phi, z = math.pi * (1 + 5**0.5) * k, 1 - 2 * k / 200
    d = np.stack([np.sqrt(1 - z * z) * np.cos(phi), np.sqrt(1 - z * z) * np.sin(phi), z], 1)
    radii = np.concatenate([[0.0], np.linspace(0.01, 3.0, 120), np.geomspace(3.0, 40.0, 20)[1:]])
    return (radii[:, None, None] * d[None]).reshape(-1, 3)


@pytest.mark.parametrize("kind", KINDS)
def test_gradient_bound_holds_at_random_poisson(kind):
    rng = np.random.default_rng(17)
    pts = dense_points()
    for falloff in FALLOFFS:
        for poisson in rng.uniform(-0.999, 0.5, size=2):
            brush = unit_brush(kind, falloff, poisson, rng)
            sup = np.linalg.norm(brush.jacobian(pts), ord=2, axis=(1, 2)).max()
            assert sup <= kernels.gradient_bound(kind, falloff, brush.poisson)
            assert sup <= brush.lipschitz() * (1 + 1e-12)
