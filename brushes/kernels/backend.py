"""Backend choice and typed entry points over the generated kernels in `_generated.py`.

The numba backend (parallel loops, cached compilation) is used when numba imports; the numpy
backend when it does not, or when the environment variable ``PLIANT_BACKEND=numpy`` is set.
Both are generated from the same sympy expressions (see `brushes.kernels.derive`).
"""
from __future__ import annotations

import bisect
import math
import os

import numpy as np

from brushes.kernels import _generated as gen

FALLOFFS = tuple(gen.FALLOFFS)
_NUMBA = None


def prefer_sleeping_threads():
    """Ask OpenMP to sleep, not spin, while it waits, unless the user chose (OMP_WAIT_POLICY).

    Spinning waits starve the other core on a busy 2-core machine (a 1,000-point call took 4 ms
    instead of 10 us under load). The command, batch workers and the viewer call this before their
    first parallel kernel; a library user's environment is left alone.
    """
    os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")


def backend_name():
    """'numba' or 'numpy': the backend the kernels run on in this process."""
    return "numba" if _numba_funcs() is not None else "numpy"


def numba_module():
    """The numba module, or None when it is missing or ``PLIANT_BACKEND=numpy`` is set.

    The one switch for every numba kernel in pliant (engine, picking, viewer).
    """
    if os.environ.get("PLIANT_BACKEND", "").strip().lower() == "numpy":
        return None
    try:
        import numba
    except ImportError:
        return None
    return numba


def _numba_funcs():
    global _NUMBA
    if _NUMBA is None:
        _NUMBA = gen._numba_kernels() if numba_module() is not None else False
    return _NUMBA or None


def scales(falloff, radius):
    """Radii (k,) and far-field-cancelling weights (k,) of a falloff for a brush radius."""
    try:
        ratios, weights = gen.FALLOFFS[falloff]
    except (KeyError, TypeError):
        raise ValueError(f"falloff: must be one of {', '.join(repr(f) for f in FALLOFFS)}, got {falloff!r}") from None
    return np.asarray(ratios, dtype=np.float64) * radius, np.asarray(weights, dtype=np.float64)


def beta_of(poisson):
    """beta = b / a = 1 / (4 (1 - nu)) of the regularized Kelvinlet (de Goes & James 2017, eq. 9)."""
    return 1.0 / (4.0 * (1.0 - poisson))


def center_value(kind, eps, weights, beta):
    """Sum over radii of the centre constant of `kind` ('grab', 'twist', 'scale', 'pinch')."""
    fn = getattr(gen, f"center_{kind}")
    return float(sum(w * fn(float(e), beta) for e, w in zip(eps, weights)))


def gradient_bound(kind, falloff, poisson):
    """Bound on sup ||J||_2 of the unit kernel (radius 1, unit strength) at Poisson's ratio `poisson`.

    The table in `_generated.GRADIENT_BOUNDS` is sampled at `BOUND_NUS`; between two samples the
    larger of the two is used (the bound varies slowly and monotonically; the table has a 1% margin).
    """
    vals = gen.GRADIENT_BOUNDS[kind][falloff]
    nus = gen.BOUND_NUS
    i = bisect.bisect_left(nus, poisson)
    if i <= 0:
        return vals[0]
    if i >= len(nus):
        return vals[-1]
    return max(vals[i - 1], vals[i])


_AFFINE_MAP = None


def affine_map(points, A, b, out=None):
    """out = points @ A.T + b for points (n, 3), A (3, 3), b (3,): (n, 3) float64.

    A parallel loop under numba (numpy's broadcasting over a trailing axis of 3 is slow on
    million-point arrays); numpy otherwise. `out` may be `points` itself.
    """
    global _AFFINE_MAP
    pts = _as_points(points)
    res = _out(out, pts.shape)
    A = np.ascontiguousarray(A, dtype=np.float64)
    b = np.ascontiguousarray(b, dtype=np.float64)
    numba = numba_module()
    if numba is None:
        res[...] = pts @ A.T + b
        return res
    if _AFFINE_MAP is None:
        @numba.njit(parallel=True, cache=True, nogil=True)
        def _map(p, A, b, out):
            for i in numba.prange(p.shape[0]):
                x, y, z = p[i, 0], p[i, 1], p[i, 2]
                for a in range(3):
                    out[i, a] = A[a, 0] * x + A[a, 1] * y + A[a, 2] * z + b[a]
            return out

        _AFFINE_MAP = _map
    return _AFFINE_MAP(pts, A, b, res)


def _as_points(points):
    """The kernels' own cheap guard: shape and dtype only. Finiteness and the field name are
    checked once at the API's entry (`brushes.checks.points`), not at every RK4 stage."""
    pts = np.asarray(points)
    if pts.ndim != 2 or pts.shape[1] != 3:
        raise ValueError(f"points: must have shape (n, 3), got {pts.shape}")
    if pts.dtype not in (np.float32, np.float64):
        pts = pts.astype(np.float64)
    if not pts.flags.c_contiguous:
        pts = np.ascontiguousarray(pts)
    return pts


def _out(out, shape):
    if out is None:
        return np.empty(shape, dtype=np.float64)
    if not isinstance(out, np.ndarray) or out.shape != shape or out.dtype != np.float64 or not out.flags.c_contiguous:
        raise ValueError(f"out: must be a C-contiguous float64 array of shape {shape}")
    return out


def grab_displacement(points, center, move, eps, weights, beta, out=None):
    """u = sum_k w_k [A(s_k) move + B(s_k) (r . move) r]: (n, 3) float64."""
    pts = _as_points(points)
    res = _out(out, pts.shape)
    funcs = _numba_funcs()
    fn = funcs[('grab_displacement', len(eps))] if funcs else gen.np_grab_displacement
    return fn(pts, center, move, eps, weights, float(beta), res)


def grab_jacobian(points, center, move, eps, weights, beta, out=None):
    """J[i, a, b] = d u_a / d x_b of `grab_displacement`: (n, 3, 3) float64."""
    pts = _as_points(points)
    res = _out(out, pts.shape + (3,))
    funcs = _numba_funcs()
    fn = funcs[('grab_jacobian', len(eps))] if funcs else gen.np_grab_jacobian
    return fn(pts, center, move, eps, weights, float(beta), res)


def affine_displacement(points, center, load, eps, weights, beta, out=None):
    """u = sum_k w_k [P F r + Q (F^T r + tr F r) + S (r . F r) r]: (n, 3) float64."""
    pts = _as_points(points)
    res = _out(out, pts.shape)
    funcs = _numba_funcs()
    fn = funcs[('affine_displacement', len(eps))] if funcs else gen.np_affine_displacement
    return fn(pts, center, load, eps, weights, float(beta), res)


def affine_jacobian(points, center, load, eps, weights, beta, out=None):
    """J[i, a, b] = d u_a / d x_b of `affine_displacement`: (n, 3, 3) float64."""
    pts = _as_points(points)
    res = _out(out, pts.shape + (3,))
    funcs = _numba_funcs()
    fn = funcs[('affine_jacobian', len(eps))] if funcs else gen.np_affine_jacobian
    return fn(pts, center, load, eps, weights, float(beta), res)


def grab_response(points, center, eps, weights, beta):
    """K (n, 3, 3) with grab displacement = K @ move: K = sum_k w_k [A(s_k) I + B(s_k) r r^T]."""
    pts = _as_points(points)
    r = np.subtract(pts, center, dtype=np.float64)
    rr = np.einsum("ij,ij->i", r, r)
    ta, tb = gen._profiles_sum(rr, eps, weights, beta, "grab_u")
    K = tb[:, None, None] * r[:, :, None] * r[:, None, :]
    K[:, 0, 0] += ta
    K[:, 1, 1] += ta
    K[:, 2, 2] += ta
    return K


def grab_magnitude_bound(dist, eps, weights, beta, move_norm):
    """Upper bound of |u| at distance `dist` from a grab's centre, decreasing in `dist`.

    |A| + |B| r^2 <= (1 - beta) t + e^2 t^3 / 2 + beta t with t = 1 / sqrt(r^2 + e^2), since r t <= 1.
    """
    total = 0.0
    for e, w in zip(eps, weights):
        t = 1.0 / math.sqrt(dist * dist + e * e)
        total += abs(w) * ((1.0 - beta) * t + 0.5 * e * e * t**3 + beta * t)
    return total * move_norm


def affine_magnitude_bound(dist, eps, weights, beta, load):
    """Upper bound of |u| at distance `dist` from an affine brush's centre, decreasing in `dist`.

    With P = (beta - 1) t^3 - 3/2 e^2 t^5, Q = beta t^3, S = -3 beta t^5 and r t <= 1:
    |u| <= sum |w| [|P| |F| r + |Q| (|F| + |tr F|) r + |S| |F| r^3]
        <= sum |w| [((1 - beta) t^2 + 3/2 e^2 t^4) |F| + beta t^2 (|F| + |tr F|) + 3 beta t^2 |F|].
    """
    fn = float(np.linalg.norm(load))
    tr = abs(float(np.trace(load)))
    total = 0.0
    for e, w in zip(eps, weights):
        t = 1.0 / math.sqrt(dist * dist + e * e)
        t2 = t * t
        total += abs(w) * (((1.0 - beta) * t2 + 1.5 * e * e * t2 * t2) * fn + beta * t2 * (fn + tr) + 3.0 * beta * t2 * fn)
    return total


def reach_of(bound, tol, start):
    """Smallest distance (to 0.1%) beyond which the decreasing function `bound` stays below `tol`."""
    if not (tol > 0 and math.isfinite(tol)):
        raise ValueError(f"tol: must be a positive number, got {tol!r}")
    if bound(0.0) < tol:
        return 0.0
    hi = max(start, 1e-300)
    while bound(hi) >= tol:
        hi *= 2.0
        if hi > 1e300:
            return math.inf
    lo = 0.0
    while hi - lo > 1e-3 * hi:
        mid = 0.5 * (lo + hi)
        if bound(mid) >= tol:
            lo = mid
        else:
            hi = mid
    return hi


def _envelope_reach(tol, eps, pointwise, loose):
    """Distance beyond which |u| < tol, from a pointwise bound and a loose decreasing bound.

    `pointwise(r)` bounds |u| at distance r (not monotone for multi-scale falloffs, where the
    radii cancel); its upper envelope sup_{r' >= r} is taken over a fine grid (every 1% of radius
    near the brush, then geometric steps of 0.5%) with a 2% margin, up to where the loose,
    decreasing bound `loose` (no cancellation) takes over.
    """
    if not (tol > 0 and math.isfinite(tol)):
        raise ValueError(f"tol: must be a positive number, got {tol!r}")
    far = reach_of(loose, tol, float(eps[0]))
    if far == 0.0 or len(eps) == 1:
        return far
    e0 = float(eps[0])
    near = np.arange(0.0, 10.0 * e0, 0.01 * e0)
    geo = 10.0 * e0 * 1.005 ** np.arange(1, 1 + int(math.ceil(math.log(max(far, 10 * e0) / (10 * e0)) / math.log(1.005))) + 1)
    grid = np.concatenate([near, geo])
    env = np.maximum.accumulate(pointwise(grid)[::-1])[::-1] * 1.02
    above = np.flatnonzero(env >= tol)
    if not len(above):
        return 0.0
    i = int(above[-1]) + 1
    return float(min(far, grid[i] if i < len(grid) else far))


def grab_reach(tol, eps, weights, beta, move_norm):
    """Distance from a grab's centre beyond which |displacement| < tol (see `_envelope_reach`)."""
    def pointwise(r):
        ta, tb = gen._profiles_sum(r * r, eps, weights, beta, "grab_u")
        return (np.abs(ta) + np.abs(tb) * r * r) * move_norm

    return _envelope_reach(tol, eps, pointwise,
                           lambda d: grab_magnitude_bound(d, eps, weights, beta, move_norm))


def affine_reach(tol, eps, weights, beta, load):
    """Distance from an affine brush's centre beyond which |displacement| < tol."""
    fn = float(np.linalg.norm(load))
    tr = abs(float(np.trace(load)))

    def pointwise(r):
        tp, tq, ts = gen._profiles_sum(r * r, eps, weights, beta, "affine_u")
        return np.abs(tp) * fn * r + np.abs(tq) * (fn + tr) * r + np.abs(ts) * fn * r**3

    return _envelope_reach(tol, eps, pointwise,
                           lambda d: affine_magnitude_bound(d, eps, weights, beta, load))
