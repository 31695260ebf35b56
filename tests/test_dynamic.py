"""Tests of `brushes.dynamic`: the secondary motion of the brushes in time.

Outside references, named beside each check:
- the elastodynamic Navier equations rho u_tt = mu lap u + (lambda + mu) grad div u + b, checked
  by finite differences in space and time of the numbers the API returns;
- Stokes' solution for a point force in an infinite elastic solid (K. Aki and P. G. Richards,
  "Quantitative Seismology", 2nd ed., eq. 4.23; quoted from memory), for the far field;
- the pressure and shear wave speeds alpha^2 = (lambda + 2 mu) / rho, beta^2 = mu / rho
  (textbook), for the arrival times of the fronts;
- Newton's second law (the material starts with acceleration b / rho under a step load and with
  velocity b / rho after a unit impulse), superposition for linear systems (a ramped load is the
  time average of step responses, an impulse the time derivative of a step), common practice;
- the load density rho_eps and the regularized Kelvinlet of de Goes & James 2017 (eqs. 8 and 9),
  written out by hand; the static brushes for the long-time limit; scipy's Rotation.
"""
import math
import os
import subprocess
import sys

import numpy as np
import pytest
from scipy import integrate
from scipy.spatial.transform import Rotation

import brushes
from brushes import kernels
from brushes.dynamic import Dynamic, pressure_speed, window

MU = 1.0 / (4.0 * math.pi)   # the brushes are per unit a = 1 / (4 pi mu)


def density(r, eps):
    # de Goes & James 2017, eq. 8
    return 15.0 * eps**4 / (8.0 * math.pi * (r * r + eps * eps) ** 3.5)


def density_gradient(rvec, eps):
    r2 = np.einsum("...i,...i->...", rvec, rvec)
    return (-105.0 * eps**4 / (8.0 * math.pi * (r2 + eps * eps) ** 4.5))[..., None] * rvec


def grab_force(brush):
    """The point force of a grab, from the paper's eq. 9 at r = 0 (a = 1, b = 1 / (4 (1 - nu))):
    u(0) = sum_k w_k (3/2 - b) / eps_k f = move."""
    eps, w = kernels.scales(brush.falloff, brush.radius)
    b = 1.0 / (4.0 * (1.0 - brush.poisson))
    return brush.move / float(np.sum(w * (1.5 - b) / eps)), eps, w


def load_at(brush, x, t, profile):
    """The body force b(x, t) = L(t) x the brush's regularized load (per unit a)."""
    if isinstance(brush, brushes.Grab):
        f, eps, w = grab_force(brush)
        r = np.linalg.norm(x - brush.center)
        return profile(t) * sum(wk * density(r, ek) for ek, wk in zip(eps, w)) * f
    # the affine load b_i = F_ik d_k rho_eps of de Goes & James 2017, sec. 4, with the brush's own
    # load matrix F (its strength; the check is the equation)
    eps, w = kernels.scales(brush.falloff, brush.radius)
    g = sum(wk * density_gradient(x - brush.center, ek) for ek, wk in zip(eps, w))
    return profile(t) * (brush._load @ g)


def hessian_stencil(x, h):
    offs = [np.zeros(3)]
    for i in range(3):
        e = np.eye(3)[i]
        offs += [h * e, -h * e]
        for j in range(i + 1, 3):
            f = np.eye(3)[j]
            offs += [h * (e + f), h * (e - f), h * (-e + f), h * (-e - f)]
    return x + np.array(offs)


def hessians(u, h):
    """H[a, i, j] = d_i d_j u_a from the stencil values u (19, 3) of `hessian_stencil`."""
    H = np.zeros((3, 3, 3))
    k = 1
    c = u[0]
    for i in range(3):
        up, um = u[k], u[k + 1]
        H[:, i, i] = (up - 2 * c + um) / h**2
        k += 2
        for j in range(i + 1, 3):
            pp, pm, mp, mm = u[k:k + 4]
            H[:, i, j] = H[:, j, i] = (pp - pm - mp + mm) / (4 * h * h)
            k += 4
    return H


def navier_terms(dyn, x, t, h, dt):
    """rho u_tt, mu lap u and grad div u at (x, t) by central differences of the API's numbers."""
    pts = hessian_stencil(x, h)
    u = dyn.displacement(pts, np.array([t - dt, t, t + dt]))
    utt = (u[0, 0] - 2 * u[1, 0] + u[2, 0]) / dt**2
    H = hessians(u[1], h)
    lap = np.einsum("aii->a", H)
    grad_div = np.einsum("jij->i", H)
    return utt, lap, grad_div


PROFILES = {"step": lambda t: 1.0, "impulse": lambda t: 0.0}


def _brushes():
    return [
        brushes.Grab((0.1, -0.2, 0.05), 0.4, (0.15, -0.05, 0.1), poisson=0.3, falloff="wide"),
        brushes.Grab((0.0, 0.0, 0.0), 0.3, (0.0, 0.1, 0.2), poisson=0.45, falloff="tight"),
        brushes.Twist((0.0, 0.1, 0.0), 0.35, (1.0, 2.0, -0.5), 25.0, poisson=0.2, falloff="medium"),
        brushes.Scale((0.0, 0.0, 0.1), 0.3, 1.2, poisson=0.25, falloff="wide"),
        brushes.Pinch((0.05, 0.0, 0.0), 0.3, [[0.1, 0.02, 0], [0.02, -0.04, 0.01], [0, 0.01, -0.06]], poisson=0.35,
                      falloff="tight"),
    ]


@pytest.mark.parametrize("brush", _brushes(), ids=lambda b: f"{b.kind}-{b.falloff}-{b.poisson}")
@pytest.mark.parametrize("load,ramp", [("step", 0.0), ("impulse", 0.0), ("step", 0.15)])
def test_navier_equations_by_finite_differences(brush, load, ramp):
    # Elastodynamic Navier equations (textbook): rho u_tt = mu lap u + (lambda + mu) grad div u + b.
    cs = 1.7
    dyn = brushes.dynamic(brush, shear_speed=cs, load=load, ramp=ramp)
    nu = brush.poisson
    rho = MU / cs**2
    lam = 2 * MU * nu / (1 - 2 * nu)
    eps = brush.radius
    if ramp > 0:
        profile = (lambda t: min(t / ramp, 1.0))
    else:
        profile = PROFILES[load]
    rng = np.random.default_rng(7)
    for k in range(4):
        d = rng.normal(size=3)
        x = brush.center + d / np.linalg.norm(d) * eps * (0.4 + 0.6 * k)
        t = (0.2 + 0.45 * k) * eps / cs
        if ramp > 0 and abs(t - ramp) < 0.05 * eps / cs:
            t += 0.1 * eps / cs                    # the load's kink is not smooth in time
        b = load_at(brush, x, t, profile)
        found = []
        for h in (4e-3, 2e-3):   # central differences, then Richardson's extrapolation in h^2
            utt, lap, gd = navier_terms(dyn, x, t, h * eps, h * eps / cs)
            found.append(rho * utt - MU * lap - (lam + MU) * gd - b)
        res = (4 * found[1] - found[0]) / 3
        scale = np.abs(rho * utt).max() + np.abs(MU * lap).max() + np.abs((lam + MU) * gd).max() + np.abs(b).max()
        assert np.abs(res).max() <= 1e-6 * scale, (k, res, scale)


def test_incompressible_field_is_divergence_free_and_pressure_balanced():
    # At nu = 1/2 (incompressible elastodynamics, textbook): div u = 0, and the momentum equation
    # holds up to the gradient of a pressure, rho u_tt - mu lap u - b = -grad p, so its curl
    # vanishes; a twist's load is divergence-free, so its pressure is 0 and the residual itself
    # vanishes. All by finite differences of the API's numbers.
    g = brushes.Grab((0, 0, 0), 0.5, (0.1, 0.2, -0.1))            # poisson 0.5
    tw = brushes.Twist((0, 0, 0), 0.5, (0, 1, 1), 40.0)
    cs, t = 1.0, 0.35
    rho = MU / cs**2
    x0 = np.array([0.3, -0.2, 0.25])

    def momentum(dyn, brush, x):
        found = []
        for hf in (4e-3, 2e-3):
            utt, lap, gd = navier_terms(dyn, x, t, hf * brush.radius, hf * brush.radius / cs)
            found.append((rho * utt - MU * lap - load_at(brush, x, t, PROFILES["step"]),
                          np.abs(rho * utt).max() + np.abs(MU * lap).max()))
        return (4 * found[1][0] - found[0][0]) / 3, found[1][1]

    for brush in (g, tw):
        dyn = brushes.dynamic(brush, shear_speed=cs)
        eps = brush.radius
        # div u = trace of the Jacobian, by central differences and Richardson's extrapolation
        divs = []
        for hd in (2e-3 * eps, 1e-3 * eps):
            pts = np.stack([x0 + s * hd * np.eye(3)[j] for j in range(3) for s in (1, -1)])
            u = dyn.displacement(pts, t)
            divs.append(sum((u[2 * j, j] - u[2 * j + 1, j]) / (2 * hd) for j in range(3)))
        assert abs((4 * divs[1] - divs[0]) / 3) <= 1e-8 * np.abs(u).max() / eps
    V, scale = momentum(brushes.dynamic(tw, shear_speed=cs), tw, x0)
    assert np.abs(V).max() <= 1e-6 * scale
    dyn = brushes.dynamic(g, shear_speed=cs)
    h = 2e-2 * g.radius
    dV = {}
    for i in range(3):
        plus, _ = momentum(dyn, g, x0 + h * np.eye(3)[i])
        minus, _ = momentum(dyn, g, x0 - h * np.eye(3)[i])
        dV[i] = (plus - minus) / (2 * h)
    curl = np.array([dV[1][2] - dV[2][1], dV[2][0] - dV[0][2], dV[0][1] - dV[1][0]])
    size = max(np.abs(dV[i]).max() for i in range(3))
    assert size > 0 and np.abs(curl).max() <= 1e-3 * size


def stokes_step(x, f, rho, alpha, beta, t):
    """Stokes' solution for a point force f H(t) at the origin (Aki & Richards eq. 4.23, from
    memory): near field (3 g g - I) / r^3 int_{r/alpha}^{r/beta} tau dtau, far fields
    g g / (alpha^2 r) H(t - r/alpha) and -(g g - I) / (beta^2 r) H(t - r/beta), over 4 pi rho."""
    r = np.linalg.norm(x)
    g = x / r
    lo, hi = r / alpha, r / beta
    near = 0.5 * (min(max(t, lo), hi) ** 2 - lo**2)
    gg = np.outer(g, g)
    u = (3 * gg - np.eye(3)) @ f / r**3 * near
    u += (gg @ f) / (alpha**2 * r) * (t > lo)
    u -= ((gg - np.eye(3)) @ f) / (beta**2 * r) * (t > hi)
    return u / (4 * math.pi * rho)


def test_far_field_against_stokes_point_force():
    # The regularized step load far from its centre (r = 40 eps) is Stokes' point force, away
    # from the fronts (which the regularization smooths over ~ eps / c).
    g = brushes.Grab((0, 0, 0), 0.05, (0.02, 0.0, 0.01), poisson=0.25)
    beta = 1.0
    alpha = beta * math.sqrt(3.0)                 # nu = 1/4: alpha^2 / beta^2 = 2 (1 - nu) / (1 - 2 nu) = 3
    dyn = brushes.dynamic(g, shear_speed=beta)
    assert dyn.pressure_speed == pytest.approx(alpha)
    rho = MU / beta**2
    f, _, _ = grab_force(g)
    r = 2.0
    dirs = [np.array([1.0, 0, 0]), np.array([0, 0, 1.0]), np.array([1.0, 1.0, 1.0]) / math.sqrt(3)]
    settled = np.linalg.norm(stokes_step(r * dirs[0], f, rho, alpha, beta, 10.0))
    for d in dirs:
        x = r * d
        for t in (0.5 * r / alpha, 0.5 * (r / alpha + r / beta), 1.5 * r / beta, 4 * r / beta):
            got = dyn.displacement(x[None], t)[0]
            want = stokes_step(x, f, rho, alpha, beta, t)
            assert np.linalg.norm(got - want) <= 0.01 * settled, (d, t, got, want)


def test_front_arrival_times():
    # Under a unit impulse, the far field is two pulses, at r / alpha along the force (the
    # pressure front) and at r / beta across it (the shear front); alpha, beta from the wave speeds.
    g = brushes.Grab((0, 0, 0), 0.05, (0.0, 0.0, 0.02), poisson=0.25)
    beta = 1.0
    alpha = beta * math.sqrt(2 * (1 - 0.25) / (1 - 2 * 0.25))
    dyn = brushes.dynamic(g, shear_speed=beta, load="impulse")
    r = 2.0
    times = np.arange(0.3, 3.0, 0.002)
    along = dyn.displacement([[0, 0, r]], times)[:, 0, 2]
    across = dyn.displacement([[r, 0, 0]], times)[:, 0, 2]
    assert abs(times[np.argmax(np.abs(along))] - r / alpha) <= 2 * g.radius / alpha
    assert abs(times[np.argmax(np.abs(across))] - r / beta) <= 2 * g.radius / beta
    # and nothing arrives before the pressure front
    early = times < r / alpha - 6 * g.radius / alpha
    assert np.abs(along[early]).max() <= 0.02 * np.abs(along).max()


@pytest.mark.parametrize("falloff", ["wide", "medium", "tight"])
@pytest.mark.parametrize("poisson", [0.3, 0.5])
def test_long_time_limit_is_the_static_brush(falloff, poisson):
    pts = np.random.default_rng(1).normal(size=(300, 3)) * 0.5
    cases = [brushes.Grab((0, 0.1, 0), 0.3, (0.1, -0.2, 0.05), poisson=poisson, falloff=falloff),
             brushes.Twist((0, 0, 0), 0.3, (0, 0, 1), 30.0, poisson=poisson, falloff=falloff),
             brushes.Pinch((0, 0, 0), 0.3, [[0.1, 0, 0], [0, -0.1, 0], [0, 0, 0]], poisson=poisson, falloff=falloff)]
    if poisson < 0.5:
        cases.append(brushes.Scale((0, 0, 0), 0.3, 1.3, poisson=poisson, falloff=falloff))
    for b in cases:
        static = b.displacement(pts)
        late = brushes.dynamic(b, shear_speed=2.0).displacement(pts, 2000.0)
        assert np.abs(late - static).max() <= 1e-9 * np.abs(static).max(), b
        gone = brushes.dynamic(b, shear_speed=2.0, load="impulse").displacement(pts, 2000.0)
        assert np.abs(gone).max() <= 1e-9 * np.abs(static).max()
    g = cases[0]
    centre = brushes.dynamic(g, shear_speed=2.0).displacement(g.center[None], 2000.0)[0]
    np.testing.assert_allclose(centre, g.move, rtol=0, atol=1e-10)    # the grab's guarantee


def test_starts_at_rest_with_newtons_acceleration():
    # Step: u = 0 at t <= 0, and u ~ (t^2 / 2) b / rho as t -> 0 (Newton's second law).
    # Impulse: u ~ t b / rho (the push's momentum). b from the paper's density (eq. 8).
    g = brushes.Grab((0, 0, 0), 0.4, (0.1, 0.05, -0.2), poisson=0.3)
    cs = 1.5
    rho = MU / cs**2
    x = np.array([[0.1, 0.2, -0.05], [0.0, 0.0, 0.0]])
    step = brushes.dynamic(g, shear_speed=cs)
    assert np.array_equal(step.displacement(x, 0.0), np.zeros((2, 3)))
    assert np.array_equal(step.displacement(x, -1.0), np.zeros((2, 3)))
    t = 2e-3 * g.radius / cs
    f, eps, w = grab_force(g)
    for xi, ui in zip(x, step.displacement(x, t)):
        b = sum(wk * density(np.linalg.norm(xi), ek) for ek, wk in zip(eps, w)) * f
        np.testing.assert_allclose(ui, 0.5 * t * t * b / rho, rtol=2e-3)
    imp = brushes.dynamic(g, shear_speed=cs, load="impulse")
    for xi, ui in zip(x, imp.displacement(x, t)):
        b = sum(wk * density(np.linalg.norm(xi), ek) for ek, wk in zip(eps, w)) * f
        np.testing.assert_allclose(ui, t * b / rho, rtol=2e-3)


def test_impulse_is_the_time_derivative_and_ramp_the_time_average_of_the_step():
    # Linear, time-invariant: the impulse response is d/dt of the step response; a load rising
    # over tau seconds gives (1/tau) int_{t - tau}^t of the step response (superposition).
    b = brushes.Twist((0, 0, 0), 0.4, (0, 1, 0), 30.0, poisson=0.2, falloff="medium")
    x = np.array([[0.2, 0.1, -0.3], [0.5, 0.0, 0.1]])
    step = brushes.dynamic(b, shear_speed=1.2)
    imp = brushes.dynamic(b, shear_speed=1.2, load="impulse")
    t, dt = 0.37, 1e-5
    fd = (step.displacement(x, t + dt) - step.displacement(x, t - dt)) / (2 * dt)
    np.testing.assert_allclose(imp.displacement(x, t), fd, rtol=1e-6, atol=1e-9 * np.abs(fd).max())
    tau = 0.25
    ramp = brushes.dynamic(b, shear_speed=1.2, ramp=tau)
    s = np.linspace(t - tau, t, 2001)
    avg = integrate.simpson(step.displacement(x, s), x=s, axis=0) / tau
    np.testing.assert_allclose(ramp.displacement(x, t), avg, rtol=1e-6, atol=1e-9 * np.abs(avg).max())


def test_damping_window():
    # The documented window: u = u_qs + h(t/d) (u_exact - u_qs), h(q) = (1 - q)^2 (1 + 2 q), with
    # the quasi-static response u_qs = L(t) u_static (L the load's rise), exactly u_qs from t = d.
    g = brushes.Grab((0, 0, 0), 0.3, (0.1, 0.0, 0.0))
    x = np.random.default_rng(2).normal(size=(50, 3)) * 0.4
    for ramp in (0.0, 0.3):
        exact = brushes.dynamic(g, shear_speed=1.0, ramp=ramp)
        damped = brushes.dynamic(g, shear_speed=1.0, damping=0.5, ramp=ramp)
        static = g.displacement(x)
        np.testing.assert_allclose(exact.limit(x), static, rtol=0, atol=1e-15)
        for t in (0.05, 0.2, 0.45, 0.5, 3.0):
            L = min(t / ramp, 1.0) if ramp else 1.0
            q = min(t / 0.5, 1.0)
            h = (1 - q) ** 2 * (1 + 2 * q)
            want = L * static + h * (exact.displacement(x, t) - L * static)
            np.testing.assert_allclose(damped.displacement(x, t), want, rtol=0, atol=1e-12)
    np.testing.assert_array_equal(damped.displacement(x, 3.0), damped.limit(x))
    assert window(0.0, 0.5) == 1.0 and window(0.5, 0.5) == 0.0 and window(0.2, None) == 1.0
    imp = brushes.dynamic(g, shear_speed=1.0, load="impulse", damping=0.5)
    np.testing.assert_array_equal(imp.displacement(x, 0.6), np.zeros_like(x))
    # an instant wave (huge speed) has no inertial part: the damped ramp is quasi-static throughout
    fast = brushes.dynamic(g, shear_speed=1e9, ramp=0.3, damping=0.5)
    np.testing.assert_allclose(fast.displacement(x, 0.1), g.displacement(x) / 3, rtol=0, atol=1e-9)


def test_moving_and_rotating_the_brush_moves_and_rotates_the_motion():
    rng = np.random.default_rng(4)
    x = rng.normal(size=(40, 3)) * 0.5
    R = Rotation.from_euler("xyz", [20, -35, 60], degrees=True)
    shift = np.array([0.3, -1.0, 2.0])
    g = brushes.Grab((0.1, 0, 0), 0.3, (0.1, 0.2, 0.0), poisson=0.3, falloff="medium")
    moved = brushes.Grab(R.apply(g.center) + shift, 0.3, R.apply(g.move), poisson=0.3, falloff="medium")
    a = brushes.dynamic(g, shear_speed=1.0).displacement(x, 0.2)
    b = brushes.dynamic(moved, shear_speed=1.0).displacement(R.apply(x) + shift, 0.2)
    np.testing.assert_allclose(b, R.apply(a), atol=1e-13)
    t = brushes.Twist((0, 0, 0), 0.4, (0, 0, 1), 30.0, poisson=0.25)
    tr = brushes.Twist(shift, 0.4, R.apply([0, 0, 1]), 30.0, poisson=0.25)
    a = brushes.dynamic(t, shear_speed=1.0, load="impulse").displacement(x, 0.3)
    b = brushes.dynamic(tr, shear_speed=1.0, load="impulse").displacement(R.apply(x) + shift, 0.3)
    np.testing.assert_allclose(b, R.apply(a), atol=1e-12)


def test_mirror_is_symmetric():
    g = brushes.Grab((0.3, 0.1, 0), 0.25, (0.1, 0.1, 0.0), poisson=0.3)
    m = brushes.mirror(g, normal=(1, 0, 0))
    dyn = brushes.dynamic(m, shear_speed=1.0)
    x = np.random.default_rng(5).normal(size=(30, 3)) * 0.5
    H = np.diag([-1.0, 1.0, 1.0])
    u = dyn.displacement(x, 0.25)
    ur = dyn.displacement(x @ H.T, 0.25)
    np.testing.assert_allclose(ur, u @ H.T, atol=1e-14)
    # and it is the brush's field plus its reflection
    single = brushes.dynamic(g, shear_speed=1.0)
    np.testing.assert_allclose(u, single.displacement(x, 0.25) + single.displacement(x @ H.T, 0.25) @ H.T,
                               atol=1e-14)


def test_pins_hold_once_settled():
    t = brushes.Twist((0, 0, 0), 0.5, (0, 0, 1), 40.0)
    pins = np.array([[0.4, 0.0, 0.0], [0.0, -0.5, 0.2]])
    dyn = brushes.dynamic(t, shear_speed=1.0, pins=pins)
    late = dyn.displacement(pins, 500.0)
    assert np.abs(late).max() <= 1e-6 * np.abs(t.displacement(np.array([[0.2, 0, 0]]))).max()
    assert np.abs(dyn.displacement(pins, 0.3)).max() > 0        # during the motion they move with the waves


def test_times_as_an_array():
    g = brushes.Grab((0, 0, 0), 0.3, (0.1, 0, 0))
    dyn = brushes.dynamic(g, shear_speed=1.0, ramp=0.1)
    x = np.random.default_rng(6).normal(size=(20, 3))
    ts = np.array([-0.1, 0.0, 0.05, 0.1, 0.7])
    many = dyn.displacement(x, ts)
    assert many.shape == (5, 20, 3) and many.dtype == np.float64
    for j, tj in enumerate(ts):
        np.testing.assert_array_equal(many[j], dyn.displacement(x, float(tj)))
    out = np.empty((20, 3))
    assert dyn.displacement(x.astype(np.float32), 0.05, out=out) is out


def test_pressure_speed():
    # alpha / beta = sqrt(2 (1 - nu) / (1 - 2 nu)) (textbook), infinite at nu = 1/2.
    assert pressure_speed(2.0, 0.25) == pytest.approx(2.0 * math.sqrt(3.0))
    assert pressure_speed(1.0, 0.0) == pytest.approx(math.sqrt(2.0))
    assert pressure_speed(1.0, 0.5) == math.inf
    assert brushes.dynamic(brushes.Grab((0, 0, 0), 1, (1, 0, 0)), shear_speed=3.0).pressure_speed == math.inf


def test_numpy_backend_gives_the_same_numbers():
    # Numba against numpy: the same generated expressions, run in a fresh process each.
    code = ("import numpy as np, brushes\n"
            "x = np.random.default_rng(8).normal(size=(64, 3)) * 0.4\n"
            "out = []\n"
            "for b in [brushes.Grab((0, 0, 0), 0.3, (0.1, 0.2, 0), poisson=0.3, falloff='tight'),\n"
            "          brushes.Twist((0, 0, 0), 0.3, (0, 1, 0), 20.0),\n"
            "          brushes.Scale((0, 0, 0), 0.3, 1.2, falloff='medium')]:\n"
            "    for load in ('step', 'impulse'):\n"
            "        d = brushes.dynamic(b, shear_speed=1.3, load=load, ramp=0.1, damping=2.0)\n"
            "        out.append(d.displacement(x, np.array([0.05, 0.3, 1.0])))\n"
            "from brushes.dynamic import backend_name\n"
            "np.save(__import__('sys').argv[1], np.stack(out)); print(backend_name())\n")
    results = {}
    for name in ("numba", "numpy"):
        env = dict(os.environ)
        if name == "numpy":
            env["PLIANT_BACKEND"] = "numpy"
        path = os.path.join(os.environ.get("TMPDIR", "/tmp"), f"pliant-dyn-{os.getpid()}-{name}.npy")
        proc = subprocess.run([sys.executable, "-c", code, path], capture_output=True, text=True, env=env,
                              timeout=900)
        assert proc.returncode == 0, proc.stderr
        results[proc.stdout.strip()] = np.load(path)
        os.remove(path)
    if "numba" not in results:
        pytest.skip("numba is not installed: only the numpy backend ran")
    a, b = results["numba"], results["numpy"]
    assert np.abs(a - b).max() <= 1e-12 * np.abs(b).max()


@pytest.mark.parametrize("kwargs,field", [
    (dict(shear_speed=0.0), "shear_speed"),
    (dict(shear_speed=float("nan")), "shear_speed"),
    (dict(shear_speed=1.0, load="push"), "load"),
    (dict(shear_speed=1.0, damping=-1.0), "damping"),
    (dict(shear_speed=1.0, ramp=-0.5), "ramp"),
    (dict(shear_speed=1.0, pins=[[0, 0]]), "pins"),
])
def test_bad_arguments_name_their_field(kwargs, field):
    g = brushes.Grab((0, 0, 0), 0.3, (0.1, 0, 0))
    with pytest.raises(ValueError, match=f"^{field}: "):
        brushes.dynamic(g, **kwargs)


def test_bad_calls_name_their_field():
    g = brushes.Grab((0, 0, 0), 0.3, (0.1, 0, 0))
    dyn = brushes.dynamic(g, shear_speed=1.0)
    with pytest.raises(ValueError, match="^t: "):
        dyn.displacement([[0, 0, 0]], "soon")
    with pytest.raises(ValueError, match="^t: "):
        dyn.displacement([[0, 0, 0]], [[0.1]])
    with pytest.raises(ValueError, match="^t: "):
        dyn.displacement([[0, 0, 0]], float("inf"))
    with pytest.raises(ValueError, match="^points: "):
        dyn.displacement([[0, 0]], 0.1)
    with pytest.raises(ValueError, match="^out: "):
        dyn.displacement([[0, 0, 0]], 0.1, out=np.empty((2, 3)))
    with pytest.raises(ValueError, match="^brush: "):
        brushes.dynamic("grab", shear_speed=1.0)
    class Bump(brushes.Brush):   # a third-party field: no elastic load to send waves
        kind = "bump"

        def displacement(self, points, out=None):
            return np.zeros((len(points), 3))

    with pytest.raises(ValueError, match="^brush: .*grab, twist, scale, pinch and handles"):
        brushes.dynamic(Bump(), shear_speed=1.0)
    assert isinstance(dyn, Dynamic)


def test_handles_are_their_loads_in_motion():
    # A handles brush is a sum of regularized point and twist loads (brushes.handles): its motion
    # settles to its static field (the handles on their targets, turned as asked), also pinned,
    # and solves the Navier equations like any sum of them.
    h = brushes.Handles([[0.0, 0.0, 0.0], [0.3, 0.1, 0.0]], [0.2, 0.15], [[0.05, 0.1, 0.0], [0.0, 0.0, 0.08]],
                        rotations=[[0, 0, 20.0], [10.0, 0, 0]], poisson=0.3)
    x = np.random.default_rng(9).normal(size=(200, 3)) * 0.4
    dyn = brushes.dynamic(h, shear_speed=1.5)
    np.testing.assert_allclose(dyn.limit(x), h.displacement(x), rtol=0, atol=1e-12)
    late = dyn.displacement(h.centers, 1000.0)
    np.testing.assert_allclose(late, h.moves, rtol=0, atol=1e-9)       # the handles' guarantee
    pins = np.array([[-0.4, 0.0, 0.0]])
    held = brushes.dynamic(h, shear_speed=1.5, pins=pins)
    assert np.abs(held.limit(pins)).max() <= 1e-12
    np.testing.assert_allclose(held.limit(x), h.pinned(pins, flow=False).displacement(x), rtol=0, atol=1e-12)
    assert np.abs(dyn.displacement(x, 0.0)).max() == 0.0
