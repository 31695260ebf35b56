"""Applying a brush: once (linear), or as a flow with fold-free steps.

A closed-form displacement applied once is right only for small moves. `apply(..., flow=True)`
treats the brush as a velocity field over pseudo-time t in [0, 1] and carries the material along
it. At Poisson's ratio 0.5 the field is divergence-free, so the flow keeps volume.

Step control. For one classical Runge-Kutta (RK4) step of size h on a field with Lipschitz
constant L, the increment d(x) has Lipschitz constant at most
hL + (hL)^2/2 + (hL)^3/6 + (hL)^4/24 < exp(hL) - 1,
so with hL <= ln(1.9) each step's map x -> x + d(x) has gradient norm below 0.9 and is one-to-one:
no step can fold space. L comes from the closed-form gradient bounds derived in `brushes.kernels.derive`.
More steps are taken where accuracy needs them (`ACCURACY_STEPS_PER_L`).

Closed forms where the flow has one:
- Twist: the field is w(|r|) (axis x r), so each point turns about the axis by an angle that
  depends only on its distance from the centre: one field evaluation, any angle.
- Scale: the field is radial, g(|r|) r; the radial ODE is solved once on a fine table of radii and
  each point is moved along its ray: no per-point time stepping.
- Grab: its centre is carried along (centre at center + t * move), so the material point at the
  centre ends exactly at center + move.
"""
from __future__ import annotations

import math

import numpy as np

from brushes import pins as _pins
from brushes.brush import Grab, Scale, Twist

#: Largest h * L of one RK4 step: exp(h L) - 1 <= 0.9 keeps each step one-to-one.
FOLD_FREE_HL = math.log(1.9)
#: Accuracy: N >= ACCURACY_STEPS_PER_L * L^(5/4) steps. RK4's global error grows like
#: L^5 / (120 N^4), so N proportional to L^(5/4) keeps it near 3e-5 of the motion at any strength.
ACCURACY_STEPS_PER_L = 3.0


class FlowStats:
    """Counts of the last apply in this process: steps and single-field evaluations."""

    steps = 0
    evaluations = 0


def _check_points(points):
    try:
        pts = np.asarray(points, dtype=np.float64)
    except (TypeError, ValueError):
        raise ValueError("points: must be an (n, 3) array of numbers") from None
    if pts.ndim != 2 or pts.shape[1] != 3:
        raise ValueError(f"points: must have shape (n, 3), got {pts.shape}")
    if not np.all(np.isfinite(pts)):
        raise ValueError("points: must be finite")
    return pts


def _check_mask(mask, n):
    if mask is None:
        return None
    try:
        w = np.asarray(mask, dtype=np.float64)
    except (TypeError, ValueError):
        raise ValueError(f"mask: must be ({n},) numbers in [0, 1], one per point") from None
    if w.shape != (n,):
        raise ValueError(f"mask: must have shape ({n},), one weight per point, got {w.shape}")
    if not np.all(np.isfinite(w)) or w.min(initial=0.0) < 0.0 or w.max(initial=0.0) > 1.0:
        raise ValueError("mask: weights must be finite and in [0, 1]")
    return w


def steps_for(lipschitz):
    """Number of RK4 steps over [0, 1] for a field with Lipschitz bound `lipschitz`."""
    if not math.isfinite(lipschitz):
        raise ValueError("brush: its gradient bound is not finite; cannot choose fold-free steps")
    return max(1, math.ceil(lipschitz / FOLD_FREE_HL), math.ceil(ACCURACY_STEPS_PER_L * lipschitz ** 1.25))


def _grab_paths(brush):
    """(start, end) centre pairs of the grab components a pin must keep clear of."""
    from brushes.mirror import Mirrored

    if isinstance(brush, Grab):
        return [(brush.center, brush.center + brush.move)]
    if isinstance(brush, Mirrored) and isinstance(brush.brush, Grab):
        g = brush.brush
        ends = np.stack([g.center, g.center + g.move])
        mirrored = brush.reflect(ends)
        return [(ends[0], ends[1]), (mirrored[0], mirrored[1])]
    return []


def _pin_solver(brush, pins, flow):
    radius = getattr(brush, "radius", None)
    if radius is None:
        raise ValueError("pins: this brush has no radius to size the pins' counter-loads")
    pins = _pins.check_pins(pins)
    for start, end in _grab_paths(brush):
        _pins.check_centre_gap(pins, np.stack([start, end if flow else start]), radius)
    return _pins.PinSolver(pins, radius, getattr(brush, "poisson", 0.5))


def apply(brush, points, *, flow=True, pins=None, mask=None):
    """New positions (n, 3) float64 of `points` (n, 3) under `brush`.

    flow : bool, integrate as a flow (True) or add the displacement once (False).
    pins : (m, 3) positions that must not move, or None.
    mask : (n,) weights in [0, 1] scaling each point's motion, or None. A mask gives up the
        elastic guarantees (volume, no folding) where it varies.
    """
    pts = _check_points(points)
    w = _check_mask(mask, len(pts))
    solver = None
    if pins is not None:
        pins = _pins.check_pins(pins)
        if len(pins):
            solver = _pin_solver(brush, pins, flow)
    if not flow:
        FlowStats.steps, FlowStats.evaluations = 1, 1
        u = brush.displacement(pts)
        if solver is not None:
            solver.correction(pts, solver.loads(brush.displacement(solver.pins)), out=u)
        new = pts + u
    elif solver is None and type(brush) is Twist:
        new = _twist_flow(brush, pts)
    elif solver is None and type(brush) is Scale:
        new = _scale_flow(brush, pts)
    else:
        new = _rk4_flow(brush, pts, solver)
    if w is not None:
        new = pts + w[:, None] * (new - pts)
    return new


def _twist_flow(brush, pts):
    """Exact flow of a twist: rotate each point about the axis by angle(|r|), one evaluation."""
    FlowStats.steps, FlowStats.evaluations = 0, 1
    q = brush.axis
    r = pts - brush.center
    v = brush.velocity(pts, 0.0)
    c = np.cross(q, r)
    cc = np.einsum("ij,ij->i", c, c)
    with np.errstate(invalid="ignore", divide="ignore"):
        ang = np.where(cc > 0.0, np.einsum("ij,ij->i", v, c) / np.where(cc > 0.0, cc, 1.0), 0.0)
    cos, sin = np.cos(ang)[:, None], np.sin(ang)[:, None]
    qr = (r @ q)[:, None]
    # Rodrigues' rotation formula
    return brush.center + r * cos + c * sin + q[None, :] * qr * (1.0 - cos)


def _radial_rate(brush, rho):
    """g(rho) of the scale velocity v = g(|r|) r, at radii rho (k,)."""
    probe = brush.center + np.outer(rho, [1.0, 0.0, 0.0])
    v = brush.velocity(probe, 0.0)
    return v[:, 0] / rho


def _scale_flow(brush, pts):
    """Exact-to-table flow of a scale brush: each point slides along its ray from the centre."""
    FlowStats.steps, FlowStats.evaluations = 0, 1
    rho0, spline = brush.radial_flow_table
    rate = math.log(brush.factor)
    r = pts - brush.center
    d = np.sqrt(np.einsum("ij,ij->i", r, r))
    lo, hi = rho0[0], rho0[-1]
    lr = np.empty_like(d)
    inner = d <= lo
    outer = d >= hi
    mid = ~(inner | outer)
    lr[mid] = spline(np.log(d[mid]))
    # near the centre the core grows by exactly `factor` (log ratio -> log factor, error O(rho^2))
    lr[inner] = rate
    if np.any(outer):
        lr[outer] = _radial_rate(brush, d[outer])  # far field: g is tiny and nearly constant over the motion
    return brush.center + r * np.exp(lr)[:, None]


def radial_flow_table(brush):
    """(radii (k,), spline of log(rho(1) / rho(0)) over log rho(0)) for a radial brush's flow.

    The radial ODE d rho / dt = g(rho) rho is integrated on 2001 radii from 1e-4 to 1e6 radii
    with many small RK4 steps (1D, cheap), once per brush.
    """
    from scipy.interpolate import CubicSpline

    eps = brush.radius
    rho0 = eps * np.logspace(-4, 6, 2001)
    # radial ODE d rho / dt = g(rho) rho on the table, many small RK4 steps (1D, cheap)
    rate = math.log(brush.factor)
    n_steps = max(64, math.ceil(40 * abs(rate)))
    h = 1.0 / n_steps
    rho = rho0.copy()
    f = lambda q: _radial_rate(brush, q) * q  # noqa: E731
    for _ in range(n_steps):
        k1 = f(rho)
        k2 = f(rho + 0.5 * h * k1)
        k3 = f(rho + 0.5 * h * k2)
        k4 = f(rho + h * k3)
        rho = rho + h / 6.0 * (k1 + 2 * k2 + 2 * k3 + k4)
    log_ratio = np.log(rho / rho0)
    return rho0, CubicSpline(np.log(rho0), log_ratio)


def _rk4_flow(brush, pts, solver):
    """Classical RK4 over t in [0, 1] with fold-free step count; pins hold at every stage.

    Works in preallocated buffers: fresh million-point temporaries cost more than the kernels.
    """
    def field(x, t, out):
        v = brush.velocity(x, t, out=out)
        if solver is not None:
            solver.correction(x, solver.loads(brush.velocity(solver.pins, t)), out=v)
        return v

    L = brush.velocity_lipschitz()
    if solver is not None:
        # the counter-loads vary with t only through the brush's motion: bound them over samples
        loads = [np.linalg.norm(solver.loads(brush.velocity(solver.pins, t)), axis=1).sum() for t in np.linspace(0, 1, 5)]
        L += 1.25 * max(loads) * solver._unit_bound
    n = steps_for(L)
    FlowStats.steps, FlowStats.evaluations = n, 4 * n
    h = 1.0 / n
    x = np.array(pts, dtype=np.float64, order="C")
    k = np.empty_like(x)
    acc = np.empty_like(x)
    stage = np.empty_like(x)
    for i in range(n):
        t = i * h
        field(x, t, k)                                   # k1
        np.copyto(acc, k)
        np.multiply(k, 0.5 * h, out=stage)
        stage += x
        field(stage, t + 0.5 * h, k)                     # k2
        np.multiply(k, 2.0, out=stage)
        acc += stage
        np.multiply(k, 0.5 * h, out=stage)
        stage += x
        field(stage, t + 0.5 * h, k)                     # k3
        np.multiply(k, h, out=stage)
        stage += x
        k *= 2.0
        acc += k
        field(stage, t + h, k)                           # k4
        acc += k
        acc *= h / 6.0
        x += acc
    return x
