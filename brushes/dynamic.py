"""Secondary motion: the elastodynamic response of an infinite elastic body to a brush's load.

`dynamic(brush, shear_speed=...)` turns a static brush into a motion in time: the same
regularized load, switched on at t = 0 (``load="step"``) or given as one push
(``load="impulse"``), travels out as a pressure wave (speed alpha) and a shear wave (speed beta =
``shear_speed``); alpha / beta = sqrt(2 (1 - nu) / (1 - 2 nu)) follows from the brush's Poisson's
ratio nu, and at nu = 1/2 the pressure part is instantaneous and moves nothing (F. de Goes and
D. L. James, "Dynamic Kelvinlets: Secondary Motions based on Fundamental Solutions of
Elastodynamics", ACM Trans. Graph. 37(4), 2018). Every formula is derived and proved in
`brushes.kernels.dynamic_derive` and generated into `brushes.kernels._dynamic_generated`.

What the numbers mean:
- The load is the static brush's load, so the step response is 0 at t = 0 and settles to
  ``brush.displacement`` (a grab's centre ends at ``center + move``). Only the two wave speeds
  matter; stiffness and density set them and then cancel.
- ``load="impulse"`` is the same load delivered in an instant, one second's worth of it: the
  displacement is the time derivative of the step response times 1 s; it starts at 0 and dies
  away to 0 (the waves carry the push off to infinity).
- ``ramp`` (seconds) spreads the load's onset: the step rises linearly over ``ramp`` seconds, the
  impulse is pushed evenly over them.
- ``damping`` (seconds) is a visual device, not a material law: the inertial part of the motion
  (the exact response minus the quasi-static one, the displacement the load would cause in a body
  without inertia, L(t) times the static brush) is multiplied by the window
  h(t) = (1 - t/d)^2 (1 + 2 t/d), which falls smoothly from 1 at t = 0 to 0 at t = d, so the
  waves are gone exactly at t = d. The damped field no longer solves the elastodynamic equations.
- The body is infinite: waves leave and never come back, so the motion lags and catches up
  rather than ringing. The model is linear (small motion) and idealized, for animation only.
"""
from __future__ import annotations

import math

import numpy as np

from brushes import checks, kernels
from brushes.brush import Brush, Grab, Twist
from brushes.handles import Handles
from brushes.mirror import Mirrored

LOADS = ("step", "impulse")

_NUMBA = None


def _generated():
    """The generated kernels, imported when first used (a large module: `import brushes` stays quick)."""
    from brushes.kernels import _dynamic_generated

    return _dynamic_generated


def _numba_funcs():
    global _NUMBA
    if _NUMBA is None:
        _NUMBA = _generated()._numba_kernels() if kernels.numba_module() is not None else False
    return _NUMBA or None


def backend_name():
    """'numba' or 'numpy': the backend the dynamic kernels run on in this process."""
    return "numba" if _numba_funcs() is not None else "numpy"


def window(t, damping):
    """The damping window h(t / d) = (1 - t/d)^2 (1 + 2 t/d) on [0, d), 0 after; 1 without damping."""
    if damping is None:
        return 1.0
    q = t / damping
    if q >= 1.0:
        return 0.0
    return (1.0 - q) ** 2 * (1.0 + 2.0 * q)


def pressure_speed(shear_speed, poisson):
    """alpha = beta sqrt(2 (1 - nu) / (1 - 2 nu)); infinite at nu = 1/2 (common practice)."""
    if poisson >= 0.5:
        return math.inf
    return shear_speed * math.sqrt(2.0 * (1.0 - poisson) / (1.0 - 2.0 * poisson))


class _Source:
    """One regularized load: a point load (kind "grab", vector `load`) or an affine load (kind
    "affine", 3x3 `load`) at `center`, radii `eps`, weights `w` (normalization folded in),
    static beta, and optionally seen through a mirror (H, shift)."""

    def __init__(self, kind, center, load, eps, w, beta, mirror=None):
        self.kind = kind
        self.center = np.ascontiguousarray(center, dtype=np.float64)
        self.load = np.ascontiguousarray(load, dtype=np.float64)
        self.eps = np.ascontiguousarray(eps, dtype=np.float64)
        self.w = np.ascontiguousarray(w, dtype=np.float64)
        self.beta = float(beta)
        self.mirror = mirror

    def mirrored(self, H, shift):
        return _Source(self.kind, self.center, self.load, self.eps, self.w, self.beta, (H, shift))


def _sources(brush, pins):
    if isinstance(brush, Mirrored):
        inner = _sources(brush.brush, None)
        out = inner + [s.mirrored(brush.H, brush.shift) for s in inner]
    elif (load := brush.kernel_load()) is not None:  # grab, or the affine loads ([dGJ17] sec. 4)
        out = [_Source(load.kind, load.center, load.load, load.eps, load.weights, load.beta)]
    elif type(brush) is Handles:
        return _handle_sources(brush, pins)
    else:
        raise checks.FieldError("brush", "the dynamic response is derived for grab, twist, scale, pinch and "
                                f"handles brushes and their mirrors, got {type(brush).__name__}")
    if pins is not None and len(pins):
        out += _pin_sources(brush, pins)
    return out


def _handle_sources(brush, pins):
    """A Handles brush is a sum of regularized loads at its handles (and pins, solved with them):
    a point load normalized as Grab's move and a twist load normalized as Twist's radians at each
    (`brushes.handles`), so each becomes the Grab and the Twist with that move and rotation."""
    held = brush if pins is None or not len(pins) else brush.pinned(pins, flow=False)
    forces, torques = held.loads(0.0)
    extra = np.zeros((0, 3)) if pins is None else pins
    points = np.concatenate([brush.centers, extra])
    radii = np.concatenate([brush.radii, np.full(len(extra), brush.radius)])
    out = []
    for p, r, f, q in zip(points, radii, forces, torques):
        if np.any(f):
            out += _sources(Grab(p, r, f, poisson=brush.poisson, falloff=brush.falloff), None)
        angle = float(np.linalg.norm(q))
        if angle > 0.0:
            out += _sources(Twist(p, r, q, math.degrees(angle), poisson=brush.poisson, falloff=brush.falloff), None)
    return out


def _pin_sources(brush, pins):
    """The counter-loads that hold `pins` still once the motion has settled: the static ones
    (`brushes.pins.PinSolver`), each a wide grab at its pin whose move is the solved force."""
    from brushes import pins as _pins

    radius = getattr(brush, "radius", None)
    if radius is None:
        raise checks.FieldError("pins", "this brush has no radius to size the pins' counter-loads")
    for start, _end in brush.pin_clearance():
        _pins.check_centre_gap(pins, np.stack([start, start]), radius)
    poisson = float(getattr(brush, "poisson", 0.5))
    solver = _pins.PinSolver(pins, radius, poisson)
    forces = solver.loads(brush.displacement(solver.pins))
    out = []
    for p, f in zip(solver.pins, forces):
        if np.any(f):
            out += _sources(Grab(p, radius, f, poisson=poisson, falloff="wide"), None)
    return out


class Dynamic:
    """The motion in time of a brush's load in an infinite elastic body; made by `dynamic`.

    Attributes: `brush`, `shear_speed` and `pressure_speed` (model units per second; the latter
    is inf at Poisson's ratio 0.5), `load` ("step" or "impulse"), `ramp` and `damping` (seconds,
    damping None when undamped), `poisson`.
    """

    def __init__(self, brush, *, shear_speed, load="step", damping=None, ramp=0.0, pins=None):
        if not isinstance(brush, Brush):
            raise checks.FieldError("brush", f"must be a Brush, got {type(brush).__name__}")
        self.brush = brush
        self.shear_speed = checks.positive("shear_speed", shear_speed)
        self.load = checks.choice("load", load, LOADS)
        self.damping = None if damping is None else checks.positive("damping", damping)
        self.ramp = checks.number("ramp", ramp)
        if self.ramp < 0:
            raise checks.FieldError("ramp", f"must be 0 or more seconds, got {ramp!r}")
        self.poisson = float(getattr(brush, "poisson", 0.5))
        self.pressure_speed = pressure_speed(self.shear_speed, self.poisson)
        self._kappa = 0.0 if self.poisson >= 0.5 else (1.0 - 2.0 * self.poisson) / (2.0 * (1.0 - self.poisson))
        if pins is not None:
            pins = checks.points("pins", pins, allow_single=True)
        self.pins = pins
        self._sources = _sources(brush, pins)

    def __repr__(self):
        return (f"Dynamic({self.brush!r}, shear_speed={self.shear_speed!r}, load={self.load!r}, "
                f"ramp={self.ramp!r}, damping={self.damping!r})")

    # ------------------------------------------------------------------ time terms
    def _terms(self, t):
        """(level, [(time, coefficient)], static coefficient) of the field at time t > 0.

        The field is sum_j coefficient_j W_level(time_j) (wave part plus m_level(time_j) times the
        static Kelvinlet, m = 0, 1, time for impulse, step, ramp); with damping the coefficients
        carry the window h and the quasi-static response's share (1 - h) L(t) is added to the
        static coefficient.
        """
        h = window(t, self.damping)
        settles = self.load == "step"
        if self.ramp > 0.0:
            level = "ramp" if settles else "step"
            terms = [(t, h / self.ramp)]
            if t > self.ramp:
                terms.append((t - self.ramp, -h / self.ramp))
        else:
            level = "step" if settles else "impulse"
            terms = [(t, h)]
        terms = [(tt, cc) for tt, cc in terms if cc != 0.0]
        multiplier = {"impulse": lambda tt: 0.0, "step": lambda tt: 1.0, "ramp": lambda tt: tt}[level]
        static_c = sum(cc * multiplier(tt) for tt, cc in terms) + (1.0 - h) * self.load_profile(t)
        return level, terms, static_c

    def load_profile(self, t):
        """L(t): the load's size at time t (s) as a share of the static brush's (1 s of push for
        the impulse), so that L(t) times `limit` is the quasi-static response, the displacement
        the load would cause in a body without inertia: step 1 (ramped: min(t / ramp, 1)),
        impulse 0 after its instant (spread: 1 / ramp while it is pushed)."""
        if t <= 0.0:
            return 0.0
        if self.load == "step":
            return min(t / self.ramp, 1.0) if self.ramp > 0.0 else 1.0
        return (1.0 / self.ramp if t < self.ramp else 0.0) if self.ramp > 0.0 else 0.0

    def limit(self, points):
        """The long-time displacement (n, 3) float64: the static brush's for the step load (with
        its pins held), 0 for the impulse."""
        pts = checks.points("points", points, keep_float32=True)
        out = np.zeros((len(pts), 3))
        if self.load == "impulse":
            return out
        return self._evaluate(pts, "step", [], 1.0, out)

    def displacement(self, points, t, out=None):
        """Displacement at `points` (n, 3) float32/float64 and time(s) `t` in seconds.

        t a number: (n, 3) float64; t an array of shape (m,): (m, n, 3) float64. Before the load
        starts (t <= 0) the displacement is 0. `out`, when given, must have the result's shape.
        """
        pts = checks.points("points", points, keep_float32=True)
        times = None if isinstance(t, (bool, np.bool_)) else np.asarray(t)
        if times is None or times.ndim > 1 or not np.issubdtype(times.dtype, np.number) \
                or not np.all(np.isfinite(times)):
            raise checks.FieldError("t", f"must be a finite number of seconds or a 1-D array of them, got {t!r}")
        times = times.astype(np.float64)
        shape = (len(pts), 3) if times.ndim == 0 else (len(times), len(pts), 3)
        res = _out(out, shape)
        if times.ndim == 0:
            return self._at(pts, float(times), res)
        for j, tj in enumerate(times):
            self._at(pts, float(tj), res[j])
        return res

    def _at(self, pts, t, out):
        out[...] = 0.0
        if t <= 0.0:
            return out
        level, terms, static_c = self._terms(t)
        return self._evaluate(pts, level, terms, static_c, out)

    def _evaluate(self, pts, level, terms, static_c, out):
        """out += the field with these terms (see `_terms`), summed over the sources."""
        if not terms and static_c == 0.0:
            return out
        n = _generated().LEVELS.index(level) + 1
        times = np.array([tt for tt, _ in terms], dtype=np.float64)
        coefs = np.array([cc for _, cc in terms], dtype=np.float64)
        cs = self.shear_speed
        compressible = self._kappa > 0.0
        ts, ks = cs * times, coefs * cs ** (2 - n)
        if compressible:
            cp = self.pressure_speed
            tp, kp = cp * times, coefs * self._kappa * cp ** (2 - n)
        else:
            tp, kp = ts, np.zeros_like(ks)
        buf = np.empty_like(out)
        for src in self._sources:
            where = pts if src.mirror is None else kernels.affine_map(pts, src.mirror[0], src.mirror[1])
            if terms:
                fn = _kernel(src.kind, level, len(src.eps), len(terms), compressible)
                fn(where, src.center, src.load, src.eps, src.w, ts, ks, tp, kp, float(static_c), src.beta, buf)
            else:   # settled: the static Kelvinlet alone
                static = kernels.grab_displacement if src.kind == "grab" else kernels.affine_displacement
                static(where, src.center, src.load, src.eps, src.w * static_c, src.beta, buf)
            if src.mirror is not None:
                kernels.affine_map(buf, src.mirror[0], np.zeros(3), out=buf)
            out += buf
        return out


def _out(out, shape):
    if out is None:
        return np.empty(shape, dtype=np.float64)
    if not isinstance(out, np.ndarray) or out.shape != shape or out.dtype != np.float64 or not out.flags.c_contiguous:
        raise checks.FieldError("out", f"must be a C-contiguous float64 array of shape {shape}")
    return out


def _kernel(kind, level, K, terms, compressible):
    funcs = _numba_funcs()
    if funcs is not None:
        return funcs[_generated().kernel_name(kind, level, K, terms, compressible)]
    gen = _generated()
    fn = gen.np_dyn_grab if kind == "grab" else gen.np_dyn_affine

    def call(points, center, load, eps, w, ts, ks, tp, kp, static_c, beta, out):
        return fn(points, center, load, eps, w, ts, ks, tp, kp, static_c, beta, out, level, compressible)

    return call


def dynamic(brush, *, shear_speed, load="step", damping=None, ramp=0.0, pins=None):
    """The secondary motion of `brush`: a `Dynamic` whose `displacement(points, t)` is the
    elastodynamic response of an infinite elastic body to the brush's regularized load.

    brush : Grab, Twist, Scale, Pinch, Handles or a mirror of one (`brushes.mirror`).
    shear_speed : float, model units per second (the shear wave speed beta); the pressure wave
        speed follows from the brush's Poisson's ratio (infinite at 0.5).
    load : "step" (switched on at t = 0, settles to `brush.displacement`) or "impulse" (one push:
        the time derivative of the step response times 1 s; dies away to 0).
    damping : seconds or None. A visual device: the inertial part of the motion (the response
        less the quasi-static one, `load_profile(t)` times `limit`) is faded by a smooth window
        that reaches 0 at t = damping, after which the field is quasi-static exactly.
    ramp : seconds over which the load comes on (a linear rise; for the impulse, an even push).
    pins : (m, 3) positions held by counter-loads, as in `Brush.apply`: the counter-loads are the
        static ones, so the pins hold exactly once the motion has settled and move a little with
        the waves before.

    >>> g = Grab((0, 0, 0), 0.5, (0.1, 0, 0))
    >>> d = dynamic(g, shear_speed=2.0)
    >>> d.displacement([[0, 0, 0]], [0.0, 0.1, 100.0])[:, 0, 0]   # doctest: +SKIP
    array([0.   , 0.031, 0.1  ])
    """
    return Dynamic(brush, shear_speed=shear_speed, load=load, damping=damping, ramp=ramp, pins=pins)
