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


_TURN = None


def turn_about_axis(points, center, axis, velocity, out=None):
    """Each point turned about the line through `center` (3,) along the unit `axis` (3,) by the
    angle phi = v . c / |c|^2, c = axis x (x - center), v its row of `velocity` (n, 3): the
    closed-form flow of a field v = w(x) (axis x r) whose w depends only on what the turn keeps
    (Rodrigues' rotation formula). Points on the axis (c = 0) stay. Returns (n, 3) float64.

    One parallel pass under numba (the numpy form takes about ten array passes); numpy otherwise.
    """
    global _TURN
    pts = _as_points(points)
    vel = _as_points(velocity)
    if vel.shape != pts.shape:
        raise ValueError(f"velocity: must have shape {pts.shape}, got {vel.shape}")
    res = _out(out, pts.shape)
    c0 = np.ascontiguousarray(center, dtype=np.float64)
    q = np.ascontiguousarray(axis, dtype=np.float64)
    numba = numba_module()
    if numba is None:
        r = pts - c0
        c = np.cross(q, r)
        cc = np.einsum("ij,ij->i", c, c)
        with np.errstate(invalid="ignore", divide="ignore"):
            ang = np.where(cc > 0.0, np.einsum("ij,ij->i", vel, c) / np.where(cc > 0.0, cc, 1.0), 0.0)
        cos, sin = np.cos(ang)[:, None], np.sin(ang)[:, None]
        res[...] = c0 + r * cos + c * sin + q[None, :] * (r @ q)[:, None] * (1.0 - cos)
        return res
    if _TURN is None:
        @numba.njit(parallel=True, cache=True, nogil=True)
        def _turn(p, c0, q, v, out):
            for i in numba.prange(p.shape[0]):
                rx, ry, rz = p[i, 0] - c0[0], p[i, 1] - c0[1], p[i, 2] - c0[2]
                cx = q[1] * rz - q[2] * ry
                cy = q[2] * rx - q[0] * rz
                cz = q[0] * ry - q[1] * rx
                cc = cx * cx + cy * cy + cz * cz
                ang = 0.0
                if cc > 0.0:
                    ang = (v[i, 0] * cx + v[i, 1] * cy + v[i, 2] * cz) / cc
                co, si = np.cos(ang), np.sin(ang)
                qr = (rx * q[0] + ry * q[1] + rz * q[2]) * (1.0 - co)
                out[i, 0] = c0[0] + rx * co + cx * si + q[0] * qr
                out[i, 1] = c0[1] + ry * co + cy * si + q[1] * qr
                out[i, 2] = c0[2] + rz * co + cz * si + q[2] * qr
            return out

        _TURN = _turn
    return _TURN(pts, c0, q, vel, res)


_SLIDE = None


def slide_along_rays(points, center, start, step, coefficients, core, out=None):
    """Each point moved along its ray from `center` (3,) to c + r exp(s(log |r|)), where s is the
    cubic spline with knots start + i * step (i = 0 .. m) and `coefficients` (4, m) in scipy's
    ``CubicSpline.c`` layout (highest power first), and s = `core` for |r| <= exp(start).

    Returns (out (n, 3) float64, far (n,) bool): rows with log |r| >= start + m * step are past
    the table, marked in `far` and left for the caller. One parallel pass under numba; numpy
    otherwise.
    """
    global _SLIDE
    pts = _as_points(points)
    res = _out(out, pts.shape)
    c0 = np.ascontiguousarray(center, dtype=np.float64)
    coef = np.ascontiguousarray(coefficients, dtype=np.float64)
    if coef.ndim != 2 or coef.shape[0] != 4 or coef.shape[1] < 1:
        raise ValueError(f"coefficients: must have shape (4, m), got {coef.shape}")
    m = coef.shape[1]
    far = np.zeros(len(pts), dtype=bool)
    numba = numba_module()
    if numba is None:
        r = pts - c0
        with np.errstate(divide="ignore"):
            x = 0.5 * np.log(np.einsum("ij,ij->i", r, r))  # -inf at the centre
        far[:] = x >= start + m * step
        inside = np.clip(x, start, start + m * step)  # the core and far rows are overwritten below
        i = np.minimum(((inside - start) / step).astype(np.int64), m - 1)
        u = inside - (start + i * step)
        lr = ((coef[0, i] * u + coef[1, i]) * u + coef[2, i]) * u + coef[3, i]
        lr[x <= start] = core
        lr[far] = 0.0
        res[...] = c0 + r * np.exp(lr)[:, None]
        return res, far
    if _SLIDE is None:
        @numba.njit(parallel=True, cache=True, nogil=True)
        def _slide(p, c0, start, step, coef, core, out, far):
            m = coef.shape[1]
            end = start + m * step
            for i in numba.prange(p.shape[0]):
                r0, r1, r2 = p[i, 0] - c0[0], p[i, 1] - c0[1], p[i, 2] - c0[2]
                rr = r0 * r0 + r1 * r1 + r2 * r2
                lr = core
                if rr > 0.0:
                    x = 0.5 * math.log(rr)
                    if x >= end:
                        far[i] = True
                        lr = 0.0
                    elif x > start:
                        k = min(int((x - start) / step), m - 1)
                        u = x - (start + k * step)
                        lr = ((coef[0, k] * u + coef[1, k]) * u + coef[2, k]) * u + coef[3, k]
                g = math.exp(lr)
                out[i, 0] = c0[0] + r0 * g
                out[i, 1] = c0[1] + r1 * g
                out[i, 2] = c0[2] + r2 * g

        _SLIDE = _slide
    _SLIDE(pts, c0, float(start), float(step), coef, float(core), res, far)
    return res, far


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


def handles_displacement(points, centers, forces, torques, eps, weights, beta, out=None):
    """u = sum_j sum_k w_k [A f_j + B (r_j . f_j) r_j + G (tau_j x r_j)] at r_j = x - c_j: (n, 3) float64.

    The forces and twist loads of many handles in one pass over the points (profiles A, B of the
    grab and G = P - Q of the skew load, per unit a, at s = sqrt(|r_j|^2 + eps[j, k]^2)).
    centers, forces, torques : (k, 3) float64 (raw loads: no centre normalization);
    eps : (k, K) float64, the K radii of each handle's falloff; weights : (K,) float64.
    """
    pts = _as_points(points)
    res = _out(out, pts.shape)
    centers, forces, torques = (np.ascontiguousarray(a, dtype=np.float64) for a in (centers, forces, torques))
    eps = np.ascontiguousarray(eps, dtype=np.float64)
    weights = np.ascontiguousarray(weights, dtype=np.float64)
    funcs = _numba_funcs()
    fn = funcs[('handles_displacement', eps.shape[1])] if funcs else gen.np_handles_displacement
    return fn(pts, centers, forces, torques, eps, weights, float(beta), res)


def handle_profiles(rr, eps, weights, beta, *, derivatives=False):
    """Weighted sums over radii of the handle profiles at squared distances rr (m,) float64.

    Returns (A, B, G), or with derivatives=True (A, B, dA, dB, G, dG) with dX = X'(s) / s: each
    (m,) float64, per unit a. The handle solve's blocks are built from these.
    """
    rr = np.asarray(rr, dtype=np.float64)
    return tuple(gen._profiles_sum(rr, np.asarray(eps, dtype=np.float64), np.asarray(weights, dtype=np.float64),
                                   float(beta), "handle_j" if derivatives else "handle_u"))


_RADIAL = {}


def _radial_table(kind, falloff, poisson):
    """(values (N,), range maxima (N, N): R[i, j] = max(values[i..j])) of RADIAL_BOUNDS, once."""
    key = (kind, falloff, poisson)
    if key not in _RADIAL:
        rows = gen.RADIAL_BOUNDS[kind][falloff]
        if len(rows) == 1:
            vals = np.asarray(rows[0])
        else:
            i = min(max(bisect.bisect_left(gen.BOUND_NUS, poisson), 1), len(gen.BOUND_NUS) - 1)
            vals = np.asarray(rows[i]) if gen.BOUND_NUS[i] == poisson else np.maximum(rows[i - 1], rows[i])
        n = len(vals)
        ranges = np.zeros((n, n))
        for i in range(n):
            ranges[i, i:] = np.maximum.accumulate(vals[i:])
        _RADIAL[key] = (vals, ranges)
    return _RADIAL[key]


def radial_bound(kind, falloff, poisson, lo, hi):
    """Bound of ||J||_2 over distances [lo, hi] (radii) from the unit normalized kernel, 'grab' or 'twist'.

    lo, hi : (...) float64, 0 <= lo <= hi (hi may be inf). The unit kernels have radius 1 and unit
    strength (as `gradient_bound`). The largest entry of `_generated.RADIAL_BOUNDS` at the grid
    points bracketing [lo, hi] (between two Poisson's ratios, the larger row), and beyond the grid
    the closed-form `gradient_envelope`.
    """
    vals, ranges = _radial_table(kind, falloff, poisson)
    grid = np.asarray(gen.RADIAL_GRID)
    lo, hi = np.broadcast_arrays(np.asarray(lo, dtype=np.float64), np.asarray(hi, dtype=np.float64))
    i = np.clip(np.searchsorted(grid, lo, side="right") - 1, 0, len(grid) - 1)
    j = np.clip(np.searchsorted(grid, hi, side="left"), 0, len(grid) - 1)
    out = ranges[i, j]
    tail = hi > grid[-1]
    if np.any(tail):
        eps, w = scales(falloff, 1.0)
        beta = beta_of(poisson)
        unit = abs(center_value(kind, eps, w, beta))
        start = np.maximum(lo[tail], grid[-1])
        env = gradient_envelope(kind, start[:, None], hi[tail][:, None], eps[None, :], w, beta)[:, 0] / unit
        out = out.copy()
        out[tail] = np.maximum(out[tail], env)
    return out


def gradient_envelope(kind, lo, hi, eps, weights, beta):
    """Bound of ||J||_2 per unit raw load over distances [lo, hi] from one kernel, kind 'grab' or 'twist'.

    The pointwise bound sum_k |w_k| sum_m c_m rho^p t^q (t = 1 / sqrt(rho^2 + eps_k^2); the monomials
    of derive.gradient_envelopes) is maximized term by term: each monomial peaks once, at
    rho^2 = p eps^2 / (q - p) (derive.prove_envelope_peaks), so its maximum over [lo, hi] is at
    that peak clipped into the interval. lo, hi : (J, G) float64 (hi may be inf);
    eps : (J, K) the radii of J kernels; weights : (K,). Returns (J, G) float64, per unit a.
    """
    terms = {"grab": gen.envelope_terms_grab, "twist": gen.envelope_terms_twist}[kind]
    lo, hi = np.asarray(lo, dtype=np.float64), np.asarray(hi, dtype=np.float64)
    eps = np.asarray(eps, dtype=np.float64)
    total = np.zeros(np.broadcast(lo, hi).shape)
    for k, w in enumerate(weights):
        e = eps[:, k][:, None]
        for p, q, c in terms(e, float(beta)):
            rho = np.clip(e * math.sqrt(p / (q - p)), lo, hi)
            total += abs(float(w)) * c * rho**p * (rho * rho + e * e) ** (-0.5 * q)
    return total


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
