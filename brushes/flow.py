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

Closed forms where the flow has one come from the brush itself (`Brush.exact_flow`: Twist
turns each point by an angle of its distance, Scale slides points along rays), and so do the
velocity (`Brush.velocity`: a grab carries its centre along, so the centre lands on center + move),
its bound (`Brush.velocity_lipschitz`, or `Brush.velocity_lipschitz_at` at each stage time when the
brush overrides it), the same RK4 steps fused into one pass per point when the brush offers them
(`Brush.fused_flow`, used with no pins), or the velocity as point loads at each stage time
(`Brush.point_loads`: grabs, handles and their mirror images, pins' counter-loads added, summed
per point in one generated pass), the segments pins must keep clear of
(`Brush.pin_clearance`) and a brush that holds the pins itself (`Brush.pinned`; for Handles
pins are handles that do not move).
This module reads nothing private of any brush, so a subclass or a plug-in brush gets the same
treatment as the built-in ones. It registers `apply` as the integrator behind `Brush.apply` when
imported; `brushes.brush` never imports it.
"""
from __future__ import annotations

import dataclasses
import math

import numpy as np

from brushes import brush as _brush
from brushes import checks
from brushes import pins as _pins
from brushes.kernels import _flow_generated as _flow_kernels

#: Largest h * L of one RK4 step: exp(h L) - 1 <= 0.9 keeps each step one-to-one.
FOLD_FREE_HL = math.log(1.9)
#: Accuracy: N >= ACCURACY_STEPS_PER_L * L^(5/4) steps. RK4's global error grows like
#: L^5 / (120 N^4), so N proportional to L^(5/4) keeps it near 3e-5 of the motion at any strength.
ACCURACY_STEPS_PER_L = 3.0


@dataclasses.dataclass
class FlowStats:
    """What one apply did: RK4 steps and single-field evaluations. Pass one as ``stats=``."""

    steps: int = 0
    evaluations: int = 0


def steps_for(lipschitz):
    """Number of RK4 steps over [0, 1] for a field with Lipschitz bound `lipschitz`."""
    if not math.isfinite(lipschitz):
        raise checks.FieldError("brush", "its gradient bound is not finite; cannot choose fold-free steps")
    return max(1, math.ceil(lipschitz / FOLD_FREE_HL), math.ceil(ACCURACY_STEPS_PER_L * lipschitz ** 1.25))


def _pin_solver(brush, pins, flow):
    radius = getattr(brush, "radius", None)
    if radius is None:
        raise checks.FieldError("pins", "this brush has no radius to size the pins' counter-loads")
    for start, end in brush.pin_clearance():
        _pins.check_centre_gap(pins, np.stack([start, end if flow else start]), radius)
    return _pins.PinSolver(pins, radius, getattr(brush, "poisson", 0.5))


def apply(brush, points, *, flow=True, pins=None, mask=None, stats=None):
    """New positions (n, 3) float64 of `points` (n, 3) under `brush`.

    flow : bool, integrate as a flow (True) or add the displacement once (False).
    pins : (m, 3) positions that must not move, or None.
    mask : (n,) weights in [0, 1] scaling each point's motion, or None. A mask gives up the
        elastic guarantees (volume, no folding) where it varies.
    stats : FlowStats or None, filled with the steps and field evaluations taken.
    """
    pts = checks.points("points", points)
    w = None if mask is None else checks.weights("mask", mask, len(pts))
    stats = FlowStats() if stats is None else stats
    solver = None
    if pins is not None:
        pins = _pins.check_pins(pins)
        if len(pins):
            held = brush.pinned(pins, flow=flow)
            if held is not None:
                brush = held
            else:
                solver = _pin_solver(brush, pins, flow)
    exact = None
    if not flow:
        stats.steps, stats.evaluations = 1, 1
        u = brush.displacement(pts)
        if solver is not None:
            solver.correction(pts, solver.loads(brush.displacement(solver.pins)), out=u)
        new = pts + u
    elif solver is None and (exact := brush.exact_flow(pts)) is not None:
        stats.steps, stats.evaluations = 0, 1
        new = exact
    else:
        new = _rk4_flow(brush, pts, solver, stats)
    if w is not None:
        new = pts + w[:, None] * (new - pts)
    return new


def _stage_times(n):
    """The pseudo-times the RK4 stages of n steps evaluate, computed as `_rk4_flow` does."""
    h = 1.0 / n
    return sorted({t for i in range(n) for t in (i * h, i * h + 0.5 * h, i * h + h)})


def _step_count(brush, extra):
    """RK4 steps for `brush`'s flow; `extra` bounds the pins' counter-field.

    A brush that bounds its field at each time (`velocity_lipschitz_at` overridden) is checked at
    exactly the stage times of the step count, which is raised until every stage's bound is served.
    """
    if type(brush).velocity_lipschitz_at is _brush.Brush.velocity_lipschitz_at:
        return steps_for(brush.velocity_lipschitz() + extra)
    n = steps_for(max(brush.velocity_lipschitz_at(t) for t in (0.0, 0.5, 1.0)) + extra)
    while True:
        m = steps_for(max(brush.velocity_lipschitz_at(t) for t in _stage_times(n)) + extra)
        if m <= n:
            return n
        n = m


def _loads_flow(brush, pts, solver, n):
    """`n` RK4 steps of a brush whose velocity is point loads (`Brush.point_loads`), with the
    pins' counter-loads added at each stage time as `_rk4_flow`'s field adds them, fused into
    one pass per point; None when the brush has no point loads."""
    h = 1.0 / n
    stages = []
    for i in range(n):
        t = i * h
        for tau in (t, t + 0.5 * h, t + h):  # the stage times of `_rk4_flow`, computed as it does
            loads = brush.point_loads(tau)
            if loads is None:
                return None
            if solver is not None:
                loads = (loads, solver.point_loads(brush.velocity(solver.pins, tau)))
            else:
                loads = (loads,)
            stages.append(loads)
    parts = stages[0]
    if len({p.beta for p in parts}) != 1:
        return None
    for stage in stages[1:]:  # one kernel call needs the same loads' radii and weights throughout
        if len(stage) != len(parts) or any(a.eps.shape != b.eps.shape or not np.array_equal(a.eps, b.eps)
                                           or not np.array_equal(a.weights, b.weights)
                                           for a, b in zip(stage, parts)):
            return None
    K = max(p.eps.shape[1] for p in parts)

    def padded(a, fill):
        return np.concatenate([a, np.repeat(a[:, -1:] if fill is None else np.full((len(a), 1), fill),
                                            K - a.shape[1], axis=1)], axis=1)

    # a load with fewer radii than the widest gets copies of its last radius with weight 0
    eps = np.concatenate([padded(p.eps, None) for p in parts])
    weights = np.concatenate([padded(p.weights, 0.0) for p in parts])
    centers = np.stack([np.concatenate([p.centers for p in stage]) for stage in stages])
    forces = np.stack([np.concatenate([p.forces for p in stage]) for stage in stages])
    torques = np.stack([np.concatenate([p.torques for p in stage]) for stage in stages])
    x = np.ascontiguousarray(pts, dtype=np.float64)
    return _flow_kernels.loads_flow(x, centers, forces, torques, eps, weights, parts[0].beta, n)


def _rk4_flow(brush, pts, solver, stats):
    """Classical RK4 over t in [0, 1] with fold-free step count; pins hold at every stage.

    Works in preallocated buffers: fresh million-point temporaries cost more than the kernels.
    """
    def field(x, t, out):
        v = brush.velocity(x, t, out=out)
        if solver is not None:
            solver.correction(x, solver.loads(brush.velocity(solver.pins, t)), out=v)
        return v

    extra = 0.0
    if solver is not None:
        # the counter-loads vary with t only through the brush's motion: bound them over samples
        extra = 1.25 * max(solver.lipschitz(solver.loads(brush.velocity(solver.pins, t)))
                           for t in np.linspace(0, 1, 5))
    n = _step_count(brush, extra)
    stats.steps, stats.evaluations = n, 4 * n
    if solver is None and (fused := brush.fused_flow(pts, steps=n)) is not None:
        return fused  # the same RK4 steps, one pass per point (`Brush.fused_flow`)
    if (fused := _loads_flow(brush, pts, solver, n)) is not None:
        return fused  # the same RK4 steps of point loads, pins included, one pass per point
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


_brush.use_integrator(apply)
