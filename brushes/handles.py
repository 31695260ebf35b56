"""Handles: several points driven to their targets at once, with loads solved together.

The field is a sum of regularized Kelvinlets (F. de Goes and D. L. James, "Regularized
Kelvinlets", ACM Trans. Graph. 36(4), 2017): a point load (their eq. 9) at each handle and, at
each handle with a rotation, the twist load (the skew affine load of their sec. 4, whose field is
G(s) tau x r). With every load normalized as Grab and Twist are (a force f alone moves its own
centre by f; a twist load tau alone has skew Jacobian [tau]x there), the loads solve

    u(c_i) = move_i                     (3 equations per handle)
    skew(J(c_i)) = [theta_i]x,          theta_i = radians(rotation_i)  (3 more per rotated handle)

a dense 3k or 6k system whose blocks come from the profiles derived in `brushes.kernels.derive`
(`prove_handle_terms`): the displacement at c_i of a force at c_j is (A I + B r r^T) f, of a twist
load G tau x r; the spin (skew part of J as a vector) of a force is (dA - B)/2 r x f, of a twist
load (G I + dG/2 (|r|^2 I - r r^T)) tau, with r = c_i - c_j. One handle with no rotation is Grab.

`LoadSolver` is the one solver: pins (`brushes.pins`) are points with zero move in it.

Flow. The velocity at pseudo-time t has the handles at c_i + t move_i with the same targets, so
the straight line c_i + t move_i solves dx/dt = v(x, t): each handle lands on its target, and pins
(targets 0) hold. Step bound: at any x, let i be the nearest load point and rho in [a, b] its
distance; every other point j is then at least max(a, |c_i - c_j| - b) away. Each load's gradient
norm is bounded at a distance by its envelope (monomials c rho^p t^q with one peak each,
`kernels.gradient_envelope`) or by its tabulated supremum, so ||J(x)|| <= own_i([a, b]) +
sum_j other_j(max(a, |c_i - c_j| - b)); the largest value over i and a grid of intervals covering
[0, inf) bounds the gradient everywhere. The flow evaluates it at every time an RK4 stage uses
(`velocity_lipschitz_at`), so each step is one-to-one.
"""
from __future__ import annotations

import copy

import numpy as np
import scipy.linalg
from scipy.linalg import lapack

from brushes import checks, kernels
from brushes.brush import Brush, PointLoads, skew

#: Points closer than this many radii cannot be told apart by the solve.
SEPARATION = 1e-4
#: Largest condition number of the (scaled) solve before a pair is refused.
MAX_CONDITION = 1e10
#: A pin closer than this many radii to a handle (or, in flow mode, its path) is refused.
MIN_CENTER_GAP = 0.25
#: Times at which `Handles.velocity_lipschitz` samples the bound, and the margin it adds; the
#: flow itself checks the bound at every stage time (`velocity_lipschitz_at`).
_SAMPLE_TIMES = np.linspace(0.0, 1.0, 17)
_SAMPLE_MARGIN = 1.25


class LoadSolver:
    """Loads at k points, solved so their summed field takes given values there.

    points : (k, 3) float64, where the loads sit and the targets are imposed.
    radii : (k,) float64, each load's radius. poisson : float. falloff : str (`kernels.FALLOFFS`).
    spin : (k,) bool or None, the points that also impose the skew part of the Jacobian (and
        carry a twist load); None is none.
    refuse : callable(i, j, distance) -> FieldError, the error for a pair (i < j) the solve
        cannot separate (its condition number, LAPACK's 1-norm estimate, exceeds `MAX_CONDITION`).

    Loads are normalized: `forces` (k, 3) in units of displacement, `torques` (k, 3) in radians.
    """

    def __init__(self, points, radii, *, poisson, falloff, spin=None, refuse):
        self.points = np.ascontiguousarray(points, dtype=np.float64)
        k = len(self.points)
        self.radii = np.broadcast_to(np.asarray(radii, dtype=np.float64), (k,)).copy()
        self.poisson, self.falloff = float(poisson), falloff
        self.spin = np.zeros(k, dtype=bool) if spin is None else np.asarray(spin, dtype=bool)
        self._beta = kernels.beta_of(self.poisson)
        scaled = [kernels.scales(falloff, r) for r in self.radii]
        self.eps = np.array([e for e, _ in scaled])  # (k, K)
        self.weights = scaled[0][1] if k else np.ones(1)
        self._grab_c = np.array([kernels.center_value("grab", e, self.weights, self._beta) for e in self.eps])
        self._twist_c = np.array([kernels.center_value("twist", e, self.weights, self._beta) for e in self.eps])
        self._spun = np.flatnonzero(self.spin)
        M = self._system()
        self._lu = lu_factor(M) if len(M) else None
        if len(M):
            rcond = lapack.dgecon(self._lu[0], float(np.abs(M).sum(axis=0).max()), norm="1")[0]
            if not (np.isfinite(rcond) and rcond * MAX_CONDITION > 1.0):
                i, j, d = closest_pair(self.points)
                raise refuse(i, j, d)
        self._unit_grab = kernels.gradient_bound("grab", falloff, self.poisson)
        self._unit_twist = kernels.gradient_bound("twist", falloff, self.poisson)

    def _system(self):
        """The scaled matrix: unknowns (f_j / radius_j, tau_j), rows (u_i / radius_i, spin_i)."""
        k, s = len(self.points), self._spun
        r = self.points[:, None, :] - self.points[None, :, :]  # r[i, j] = c_i - c_j
        rr = np.einsum("ijk,ijk->ij", r, r)
        A, B, dA, dB, G, dG = (np.empty((k, k)) for _ in range(6))
        for j in range(k):
            A[:, j], B[:, j], dA[:, j], dB[:, j], G[:, j], dG[:, j] = kernels.handle_profiles(
                rr[:, j], self.eps[j], self.weights, self._beta, derivatives=True)
        eye = np.eye(3)
        cross = np.zeros((k, k, 3, 3))  # [r]x per pair
        cross[..., 0, 1], cross[..., 0, 2], cross[..., 1, 2] = -r[..., 2], r[..., 1], -r[..., 0]
        cross[..., 1, 0], cross[..., 2, 0], cross[..., 2, 1] = r[..., 2], -r[..., 1], r[..., 0]
        scale_i = self.radii[:, None, None, None]
        scale_j = self.radii[None, :, None, None]
        gc = self._grab_c[None, :, None, None]
        tc = self._twist_c[None, :, None, None]
        rrT = r[..., :, None] * r[..., None, :]
        uf = (A[..., None, None] * eye + B[..., None, None] * rrT) / gc * scale_j / scale_i
        blocks = [[uf]]
        if len(s):
            ut = -G[..., None, None] * cross / tc / scale_i
            wf = 0.5 * (dA - B)[..., None, None] * cross / gc * scale_j
            wt = (G[..., None, None] * eye + 0.5 * dG[..., None, None] * (rr[..., None, None] * eye - rrT)) / tc
            blocks = [[uf, ut[:, s]], [wf[s], wt[s][:, s]]]
        rows = []
        for row in blocks:
            rows.append(np.concatenate([b.transpose(0, 2, 1, 3).reshape(3 * b.shape[0], 3 * b.shape[1])
                                        for b in row], axis=1))
        return np.concatenate(rows, axis=0)

    def solve(self, moves, rotations=None):
        """Loads (forces (k, 3), torques (k, 3)) whose field has displacement `moves` (k, 3) at
        the points and, at the spin points, skew Jacobian [rotations]x (rotations (k, 3), radians;
        rows of points without spin are ignored)."""
        k, s = len(self.points), self._spun
        forces, torques = np.zeros((k, 3)), np.zeros((k, 3))
        if not k:
            return forces, torques
        rhs = [(np.asarray(moves, dtype=np.float64) / self.radii[:, None]).ravel()]
        if len(s):
            rhs.append(np.asarray(rotations, dtype=np.float64)[s].ravel())
        x = scipy.linalg.lu_solve(self._lu, np.concatenate(rhs))
        forces[:] = x[:3 * k].reshape(k, 3) * self.radii[:, None]
        torques[s] = x[3 * k:].reshape(-1, 3)
        return forces, torques

    def _raw(self, loads):
        forces, torques = loads
        return forces / self._grab_c[:, None], torques / self._twist_c[:, None]

    def field(self, points, loads, out=None):
        """The loads' summed displacement (n, 3) float64 at `points` (n, 3), one pass (written into `out`)."""
        f, q = self._raw(loads)
        return kernels.handles_displacement(points, self.points, f, q, self.eps, self.weights, self._beta, out)

    def point_loads(self, loads):
        """`loads` as the `PointLoads` whose summed field is `field(., loads)`."""
        f, q = self._raw(loads)
        k = len(self.points)
        return PointLoads(np.array(self.points, dtype=np.float64), f, q, self.eps,
                          np.tile(np.asarray(self.weights, dtype=np.float64), (k, 1)), float(self._beta))

    def jacobian(self, points, loads):
        """The loads' summed Jacobian (n, 3, 3) float64, J[i, a, b] = d u_a / d x_b."""
        f, q = self._raw(loads)
        J = np.zeros((len(points), 3, 3))
        for j, c in enumerate(self.points):
            J += kernels.grab_jacobian(points, c, f[j], self.eps[j], self.weights, self._beta)
            if np.any(q[j]):
                J += kernels.affine_jacobian(points, c, skew(q[j]), self.eps[j], self.weights, self._beta)
        return J

    def sup_bounds(self, loads):
        """((k,), (k,)) bounds of sup over space of ||J|| of each force's and each twist load's own field."""
        forces, torques = loads
        return (np.linalg.norm(forces, axis=1) * self._unit_grab / self.radii,
                np.linalg.norm(torques, axis=1) * self._unit_twist)

    def _near(self, idx, lo, hi, sups, scales):
        """Bound of ||J|| of loads `idx` (J,) over distances [lo, hi] (J, G) from their points: the
        least of the load's supremum, the tabulated radial bound and the closed-form envelope."""
        out = np.zeros(np.shape(lo))
        for kind, sup, scale in zip(("grab", "twist"), sups, scales):
            if not np.any(scale[idx]):
                continue
            r = self.radii[idx][:, None]
            unit = scale[idx][:, None] * (np.abs(self._grab_c if kind == "grab" else self._twist_c)[idx][:, None])
            table = kernels.radial_bound(kind, self.falloff, self.poisson, lo / r, hi / r)
            table = table * (unit / r if kind == "grab" else unit)
            env = scale[idx][:, None] * kernels.gradient_envelope(kind, lo, hi, self.eps[idx], self.weights, self._beta)
            out += np.minimum(np.minimum(sup[idx][:, None], table), env)
        return out

    def lipschitz(self, loads):
        """Bound of sup over space of ||J||_2 of the loads' field.

        For x nearest to load point i at a distance rho in [a, b], every other point j is at least
        max(a, |c_i - c_j| - b) away, and each load's gradient is bounded at a distance by `_near`:
        the bound is the largest, over i and over intervals [a, b] covering [0, inf), of the
        own term plus the others'. Any grid of intervals gives a bound; a finer one a tighter bound.
        """
        k = len(self.points)
        if not k:
            return 0.0
        sups = self.sup_bounds(loads)
        scales = (np.linalg.norm(loads[0], axis=1) / np.abs(self._grab_c),
                  np.linalg.norm(loads[1], axis=1) / np.abs(self._twist_c))
        d = np.linalg.norm(self.points[:, None, :] - self.points[None, :, :], axis=-1)
        near = 3.0 * self.eps.max(axis=1)
        far = np.maximum(d.max(axis=1), 1.01 * near)
        edges = np.concatenate([np.linspace(0.0, near, 25).T, np.geomspace(near, far, 40).T[:, 1:],
                                np.full((k, 1), np.inf)], axis=1)  # (k, G + 1)
        lo, hi = edges[:, :-1], edges[:, 1:]
        own = self._near(np.arange(k), lo, hi, sups, scales)
        others_lo = np.maximum(lo[:, None, :], d[:, :, None] - hi[:, None, :])  # (i, j, G)
        j_idx = np.broadcast_to(np.arange(k)[None, :], (k, k)).ravel()
        others = self._near(j_idx, others_lo.reshape(k * k, -1), np.full((k * k, lo.shape[1]), np.inf), sups, scales)
        others = others.reshape(k, k, -1)
        others[np.arange(k), np.arange(k)] = 0.0
        return float((own + others.sum(axis=1)).max())

    def reach(self, tol, loads, center):
        """Distance from `center` (3,) beyond which the loads' displacement is below `tol`."""
        forces, torques = loads
        terms = [(j, "grab") for j in range(len(self.points)) if np.any(forces[j])]
        terms += [(j, "twist") for j in range(len(self.points)) if np.any(torques[j])]
        if not terms:
            return 0.0
        f, q = self._raw(loads)
        each = tol / len(terms)
        out = 0.0
        for j, kind in terms:
            offset = float(np.linalg.norm(self.points[j] - center))
            if kind == "grab":
                r = kernels.grab_reach(each, self.eps[j], self.weights / self._grab_c[j], self._beta,
                                       float(np.linalg.norm(forces[j])))
            else:
                r = kernels.affine_reach(each, self.eps[j], self.weights, self._beta, skew(q[j]))
            out = max(out, offset + r)
        return out


_LU = None


def lu_factor(M):
    """(LU, pivots) of a square (n, n) float64 matrix, as `scipy.linalg.lu_factor` returns them.

    A plain, single-threaded partial-pivoting elimination under numba: the handle systems are
    small (tens to a few hundred rows), and a threaded LAPACK call on a busy machine spends far
    longer waiting for its threads than working (100 ms instead of 0.4 ms for 144 rows). Without
    numba, scipy's LAPACK call.
    """
    global _LU
    numba = kernels.numba_module()
    if numba is None:
        return scipy.linalg.lu_factor(M)
    if _LU is None:
        @numba.njit(cache=True, nogil=True)
        def _factor(a):
            n = a.shape[0]
            piv = np.empty(n, dtype=np.int32)
            for k in range(n):
                p = k
                big = abs(a[k, k])
                for i in range(k + 1, n):
                    if abs(a[i, k]) > big:
                        big = abs(a[i, k])
                        p = i
                piv[k] = p
                if p != k:
                    for j in range(n):
                        a[k, j], a[p, j] = a[p, j], a[k, j]
                if a[k, k] != 0.0:
                    inv = 1.0 / a[k, k]
                    for i in range(k + 1, n):
                        a[i, k] *= inv
                        f = a[i, k]
                        if f != 0.0:
                            for j in range(k + 1, n):
                                a[i, j] -= f * a[k, j]
            return a, piv

        _LU = _factor
    return _LU(np.array(M, dtype=np.float64, order="C"))


def closest_pair(points):
    """(i, j, distance) of the two closest of `points` (k, 3), i < j; (0, 0, 0.0) for fewer than two."""
    if len(points) < 2:
        return 0, 0, 0.0
    d = np.linalg.norm(points[:, None, :] - points[None, :, :], axis=-1)
    np.fill_diagonal(d, np.inf)
    i, j = np.unravel_index(np.argmin(d), d.shape)
    return int(min(i, j)), int(max(i, j)), float(d[i, j])


def closest_approach(a, va, b, vb):
    """(time in [0, 1], distance) of the closest approach of points a + t va and b + t vb, all (3,)."""
    d0, dv = a - b, va - vb
    denom = float(dv @ dv)
    t = 0.0 if denom == 0.0 else min(1.0, max(0.0, -float(d0 @ dv) / denom))
    return t, float(np.linalg.norm(d0 + t * dv))


def _radii(radius, k):
    """(the radius as given, (k,) float64 radii) from one positive number or k of them."""
    if isinstance(radius, (list, tuple, np.ndarray)):
        if len(radius) != k or any(isinstance(v, (list, tuple, np.ndarray)) for v in radius):
            raise checks.FieldError("radius", f"must be one number, or one per handle ({k}), got {radius!r}")
        radii = np.array([checks.positive(f"radius[{i}]", v) for i, v in enumerate(radius)])
        return radii.tolist(), radii
    r = checks.positive("radius", radius)
    return r, np.full(k, r)


def _rows(name, value, rows=None):
    """(k, 3) float64 from a list of [x, y, z] rows (one (3,) point is one row); each row is
    checked on its own, so an error names it (``moves[2]: must be 3 numbers``)."""
    if isinstance(value, np.ndarray) and value.dtype.kind not in "iuf":
        raise checks.FieldError(name, f"must be numbers, got an array of dtype {value.dtype}")
    if not isinstance(value, (list, tuple, np.ndarray)):
        raise checks.FieldError(name, f"must be a list of [x, y, z] rows, got {value!r}")
    if len(value) == 3 and not any(isinstance(v, (list, tuple, np.ndarray)) for v in value):
        value = [value]  # one point
    arr = np.array([checks.vector(f"{name}[{i}]", row) for i, row in enumerate(value)]).reshape(-1, 3)
    if rows is not None and len(arr) != rows:
        raise checks.FieldError(name, f"must have {rows} {'row' if rows == 1 else 'rows'} (one per handle), "
                                f"got {len(arr)}")
    return np.ascontiguousarray(arr)


class Handles(Brush):
    """Handles: points moved to their targets (and turned), all at once, by one elastic field.

    centers : (k, 3) float64 (one (3,) point is one handle), radius : float or (k,) floats,
    moves : (k, 3) float64, rotations : (k, 3) rotation vectors in degrees (axis times angle) or
    None (no twist loads: the handles turn as the field carries them), poisson : float in
    (-1, 0.5], falloff : "wide" | "medium" | "tight".

    `displacement(centers[i]) == moves[i]`; with rotations, the skew part of `jacobian(centers[i])`
    is `[radians(rotations[i])]x`. One handle with no rotation equals `Grab`.
    """

    kind = "handles"

    def __init__(self, centers, radius, moves, *, rotations=None, poisson=0.5, falloff="wide"):
        self.centers = _rows("centers", centers)
        k = len(self.centers)
        if k == 0:
            raise checks.FieldError("centers", "must hold at least one handle")
        self._radius_given, self.radii = _radii(radius, k)
        self.moves = _rows("moves", moves, k)
        self.rotations = None if rotations is None else _rows("rotations", rotations, k)
        self.poisson = checks.poisson(poisson)
        self.falloff = checks.choice("falloff", falloff, kernels.FALLOFFS)
        #: The smallest handle radius (sizes pins, the viewer's ring); the centroid of the handles.
        self.radius = float(self.radii.min())
        self.center = self.centers.mean(axis=0)
        self._pins = np.zeros((0, 3))
        self._solves = {}
        self._paths_checked = False
        self._rest = self._solve_at(0.0)

    # -- the constraint set: handles, then pins (targets 0, no spin) --------------------------
    def _points_at(self, t):
        return np.concatenate([self.centers + t * self.moves, self._pins])

    def _targets(self):
        m = len(self._pins)
        moves = np.concatenate([self.moves, np.zeros((m, 3))])
        spin = np.zeros(len(moves), dtype=bool)
        rot = np.zeros_like(moves)
        if self.rotations is not None:
            spin[:len(self.centers)] = True
            rot[:len(self.centers)] = np.radians(self.rotations)
        return moves, rot, spin

    def _describe(self, i):
        k = len(self.centers)
        return (f"centers[{i}]", f"handle {i}") if i < k else (f"pins[{i - k}]", f"pin {i - k}")

    def _refuse(self, t):
        def refuse(i, j, d):
            field, name_j = self._describe(j)
            _, name_i = self._describe(i)
            when = "" if t == 0.0 else f" at pseudo-time {t:.3g} of the flow"
            gap = SEPARATION * self.radius
            if i >= len(self.centers):  # both pins: the pins' own wording
                return checks.FieldError(field, f"pins {i - len(self.centers)} and {j - len(self.centers)} are "
                                         f"{d:.3g} apart, closer than the solve can separate (keep pins at least "
                                         f"{gap:.3g}, 1e-4 radii, apart)")
            return checks.FieldError(field, f"{name_i} and {name_j} are {d:.3g} apart{when}, closer than the "
                                     f"solve can separate (keep them at least {gap:.3g}, 1e-4 radii, apart)")
        return refuse

    def _solve_at(self, t):
        """(solver, loads) with the handles at c + t move, cached per t (RK4 reuses stage times)."""
        t = float(t)
        hit = self._solves.get(t)
        if hit is not None:
            return hit
        if t != 0.0 and not self._paths_checked:
            self._check_paths()
            self._paths_checked = True
        moves, rot, spin = self._targets()
        solver = LoadSolver(self._points_at(t), np.concatenate([self.radii, np.full(len(self._pins), self.radius)]),
                            poisson=self.poisson, falloff=self.falloff, spin=spin, refuse=self._refuse(t))
        entry = (solver, solver.solve(moves, rot))
        if len(self._solves) >= 64:
            self._solves.pop(next(iter(self._solves)))
        self._solves[t] = entry
        return entry

    # -- the Brush face ---------------------------------------------------------------------------
    def params(self):
        p = {"centers": self.centers.tolist(), "radius": self._radius_given, "moves": self.moves.tolist()}
        if self.rotations is not None:
            p["rotations"] = self.rotations.tolist()
        return {**p, "poisson": self.poisson, "falloff": self.falloff}

    def displacement(self, points, out=None):
        """u (n, 3) float64 at `points` (n, 3) float32 or float64; written into `out` if given."""
        solver, loads = self._rest
        return solver.field(points, loads, out)

    def jacobian(self, points):
        """J (n, 3, 3) float64, J[i, a, b] = d u_a / d x_b, in closed form."""
        solver, loads = self._rest
        return solver.jacobian(np.asarray(points, dtype=np.float64), loads)

    def lipschitz(self):
        solver, loads = self._rest
        return solver.lipschitz(loads)

    def reach(self, tol):
        solver, loads = self._rest
        return solver.reach(tol, loads, self.center)

    def loads(self, t=0.0):
        """(forces (k, 3), torques (k, 3)) of the handles at pseudo-time t, normalized as Grab's
        move and Twist's radians (the pins' loads, if any, follow in the same arrays)."""
        return tuple(a.copy() for a in self._solve_at(t)[1])

    def velocity(self, points, t, out=None):
        """The field with the handles at c + t move and the same targets: each handle travels
        straight to its target and the pins hold."""
        solver, loads = self._solve_at(t)
        return solver.field(points, loads, out)

    def point_loads(self, t):
        """The loads solved with the handles at c + t move (None for a subclass)."""
        if type(self) is not Handles:
            return None
        solver, loads = self._solve_at(t)
        return solver.point_loads(loads)

    def velocity_lipschitz_at(self, t):
        solver, loads = self._solve_at(t)
        return solver.lipschitz(loads)

    def velocity_lipschitz(self):
        """Sampled over 17 times with a 25% margin; the flow checks `velocity_lipschitz_at` at
        every stage time it uses, so the margin matters only to wrappers such as `mirror`."""
        return _SAMPLE_MARGIN * max(self.velocity_lipschitz_at(t) for t in _SAMPLE_TIMES)

    def pin_clearance(self):
        return [(c, c + m) for c, m in zip(self.centers, self.moves)]

    def pinned(self, pins, *, flow=True):
        """These handles with `pins` (m, 3) added as handles of zero move, solved together."""
        pins = checks.points("pins", pins, allow_single=True, letter="m")
        for p, pin in enumerate(pins):
            for j, (c, m) in enumerate(zip(self.centers, self.moves)):
                _, d = closest_approach(pin, np.zeros(3), c, m if flow else np.zeros(3))
                if d < MIN_CENTER_GAP * self.radii[j]:
                    path = " path" if flow and np.any(m) else ""
                    raise checks.FieldError(f"pins[{p}]", f"pin {p} is {d:.3g} from handle {j}'s centre{path}, "
                                            f"closer than {MIN_CENTER_GAP} radii: a pin cannot sit on a handle")
        held = copy.copy(self)
        held._pins = np.ascontiguousarray(pins)
        held._solves = {}
        held._rest = held._solve_at(0.0)
        return held

    def _check_paths(self):
        """Refuse two handles whose straight paths meet (closer than `SEPARATION` radii)."""
        k = len(self.centers)
        for i in range(k):
            for j in range(i + 1, k):
                t, d = closest_approach(self.centers[i], self.moves[i], self.centers[j], self.moves[j])
                if d < SEPARATION * min(self.radii[i], self.radii[j]):
                    raise checks.FieldError(f"moves[{j}]", f"handles {i} and {j} meet on their way to their targets "
                                            f"(at pseudo-time {t:.3g}, {d:.3g} apart); their paths must not cross")


__all__ = ["Handles", "LoadSolver", "closest_pair", "closest_approach", "lu_factor", "SEPARATION",
           "MAX_CONDITION", "MIN_CENTER_GAP"]
