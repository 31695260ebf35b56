"""The elastic brushes: `Brush` and the four regularized Kelvinlet brushes.

Each brush is a displacement field in space given in closed form by the generated kernels
(F. de Goes and D. L. James, "Regularized Kelvinlets: Sculpting Brushes based on Fundamental
Solutions of Elasticity", ACM Trans. Graph. 36(4), 2017). The classes only check arguments,
work out the elastic load that produces what the artist asked for at the brush centre, and
forward to `brushes.kernels`. Integration as a flow lives in `brushes.flow`, which imports this
module and registers itself as the integrator behind `Brush.apply`; this module never imports it.
What the flow needs from a brush is public here: `velocity`, `velocity_lipschitz`,
`velocity_lipschitz_at`, `exact_flow`, `fused_flow`, `fused_mirror_flow`, `point_loads`,
`pin_clearance` and `pinned`; what the elastodynamic response needs is `kernel_load`.
"""
from __future__ import annotations

import functools
import math
from typing import NamedTuple

import numpy as np

from brushes import checks, kernels
from brushes.kernels import _flow_generated as flow_kernels

_integrator = None


def use_integrator(function):
    """Register `function(brush, points, *, flow, pins, mask, stats)` behind `Brush.apply`.

    `brushes.flow` registers itself when it is imported (the package's face imports it).
    """
    global _integrator
    _integrator = function


def skew(axis):
    """[axis]x: the (3, 3) cross-product matrix, [axis]x @ v == cross(axis, v)."""
    a = np.asarray(axis, dtype=np.float64)
    return np.array([[0.0, -a[2], a[1]], [a[2], 0.0, -a[0]], [-a[1], a[0], 0.0]])


class PointLoads(NamedTuple):
    """Point loads whose summed field is a velocity at one time (`Brush.point_loads`): load l is
    the force ``forces[l]`` and the twist load ``torques[l]`` at ``centers[l]``, with radii
    ``eps[l]`` and weights ``weights[l]``, as `brushes.kernels.handles_displacement` sums them.
    Along one flow only the centres and loads may change with t (else the flow takes its
    generic loop).

    centers, forces, torques : (L, 3) float64.  eps, weights : (L, K) float64.  beta : float.
    """

    centers: np.ndarray
    forces: np.ndarray
    torques: np.ndarray
    eps: np.ndarray
    weights: np.ndarray
    beta: float


class KernelLoad(NamedTuple):
    """The one regularized load a built-in brush's displacement is made of (`Brush.kernel_load`):
    ``kind`` "grab" (``load`` (3,), the move, with ``weights`` carrying the centre normalization)
    or "affine" (``load`` (3, 3), the matrix F of [dGJ17] sec. 4), at ``center`` (3,), with radii
    ``eps`` (K,), weights (K,) and beta = 1 / (4 (1 - poisson)).
    """

    kind: str
    center: np.ndarray
    load: np.ndarray
    eps: np.ndarray
    weights: np.ndarray
    beta: float


class Brush:
    """Base class of every brush: a displacement field in space.

    Subclasses implement `displacement`, `jacobian`, `lipschitz` and `params`, set `kind`, and
    inherit `apply` (flow integration with fold-free steps, pins and mask). `components(t)` gives
    the velocity fields at pseudo-time t for the flow; the default is the brush itself.
    """

    kind = "brush"

    def displacement(self, points, out=None):  # pragma: no cover - interface
        raise NotImplementedError

    def jacobian(self, points):  # pragma: no cover - interface
        raise NotImplementedError

    def lipschitz(self):  # pragma: no cover - interface
        """Upper bound of sup over space of ||jacobian||_2 (the field's Lipschitz constant)."""
        raise NotImplementedError

    def params(self):  # pragma: no cover - interface
        raise NotImplementedError

    def reach(self, tol):
        """Distance from `center` beyond which |displacement| < tol; inf when unknown."""
        return math.inf

    def velocity(self, points, t, out=None):
        """The flow's velocity field at pseudo-time t in [0, 1]; by default the displacement."""
        return self.displacement(points, out=out)

    def velocity_lipschitz(self):
        """Upper bound of the velocity field's Lipschitz constant over t in [0, 1]."""
        return self.lipschitz()

    def velocity_lipschitz_at(self, t):
        """Upper bound of the Lipschitz constant of `velocity(., t)` at the one time t.

        A brush whose field changes with t overrides this (Handles re-solves its loads); the flow
        then checks it at every time an RK4 stage uses. The default is `velocity_lipschitz()`.
        """
        return self.velocity_lipschitz()

    def pinned(self, pins, *, flow=True):
        """This brush holding `pins` (m, 3) with loads of its own, or None (the default).

        None: the flow holds the pins with counter-loads (`brushes.pins`). A brush whose targets
        the counter-loads would disturb (Handles) returns a brush that solves for the pins too.
        """
        return None

    def exact_flow(self, points):
        """The time-1 flow map of `velocity` at `points` (n, 3) in closed form, or None.

        None (the default) means the flow integrates the velocity with fold-free RK4 steps.
        Twist and Scale return their closed forms; a subclass that changes the field must
        override this too (they return None when `type(self)` is not their own class).
        """
        return None

    def fused_flow(self, points, *, steps):
        """`steps` classical RK4 steps of `velocity` over [0, 1] at `points` (n, 3) float64, fused
        into one pass per point, as (n, 3) float64; or None (the default).

        None means the flow runs its own RK4 loop over whole arrays. A brush that offers this must
        give what that loop gives with the same `steps` (to rounding); the flow picks `steps` and
        uses it only with no pins. A subclass that changes the field must override this too.
        """
        return None

    def fused_mirror_flow(self, points, *, steps, H, shift):
        """`fused_flow` of this brush together with its mirror image, whose velocity at x is
        H v(H x + shift) (H = I - 2 n n^T (3, 3), `shift` (3,) along n: `brushes.mirror`), or None
        (the default: the mirrored brush takes the flow's own RK4 loop). A subclass that changes
        the field must override this too.
        """
        return None

    def kernel_load(self):
        """The displacement's one regularized load as a `KernelLoad`, or None (the default:
        a brush that is not one Kelvinlet load, or a subclass whose field may differ)."""
        return None

    def point_loads(self, t):
        """The velocity at pseudo-time t as point loads (`PointLoads`), or None (the default).

        A brush whose velocity is a sum of point loads (grabs, handles, their mirror images)
        returns them; the flow then runs its RK4 steps, pins included, fused in one pass per
        point (`brushes.kernels.flow_derive`, ``loads_flow``). A subclass that changes the field
        must override this too.
        """
        return None

    def pin_clearance(self):
        """Segments [(start (3,), end (3,)), ...] that pins must keep clear of.

        A point that the brush drives to a set place (a grab's centre along its path) cannot
        also be held still; the flow refuses pins within `brushes.pins.MIN_CENTER_GAP` radii.
        """
        return []

    def apply(self, points, *, flow=True, pins=None, mask=None, stats=None):
        """New positions (n, 3) float64 of `points` under this brush.

        flow=False: points + displacement. flow=True: the brush integrated as a velocity field
        over pseudo-time [0, 1] with fold-free steps (see `brushes.flow`). `pins` (m, 3) stay
        still; `mask` (n,) in [0, 1] scales each point's motion; `stats`, a
        `brushes.flow.FlowStats`, receives the step and evaluation counts.
        """
        if _integrator is None:  # pragma: no cover - the package's face imports brushes.flow
            raise RuntimeError("brushes.flow is not imported: import brushes")
        return _integrator(self, points, flow=flow, pins=pins, mask=mask, stats=stats)

    def __eq__(self, other):
        if type(self) is not type(other):
            return NotImplemented
        a, b = self.params(), other.params()
        return a.keys() == b.keys() and all(np.array_equal(np.asarray(a[k]), np.asarray(b[k])) for k in a)

    __hash__ = None

    def __repr__(self):
        inner = ", ".join(f"{k}={v!r}" for k, v in self.params().items())
        return f"{type(self).__name__}({inner})"


class _Kelvinlet(Brush):
    """Shared set-up of the four regularized Kelvinlet brushes."""

    default_poisson = 0.5

    def __init__(self, center, radius, *, poisson, falloff):
        self.center = checks.vector("center", center)
        self.radius = checks.positive("radius", radius)
        self.poisson = checks.poisson(poisson)
        self.falloff = checks.choice("falloff", falloff, kernels.FALLOFFS)
        self._eps, self._w = kernels.scales(falloff, self.radius)
        self._beta = kernels.beta_of(self.poisson)

    def _base_params(self):
        return {"center": self.center.tolist(), "radius": self.radius}

    def _tail_params(self):
        return {"poisson": self.poisson, "falloff": self.falloff}


class Grab(_Kelvinlet):
    """Grab: a regularized Kelvinlet under a point load, normalized so `displacement(center) == move`.

    u(r) = sum_k w_k [A(s_k) I + B(s_k) r r^T] f with A = a ((1 - b/a)/s + eps^2 / (2 s^3)),
    B = b / s^3, s = sqrt(|r|^2 + eps^2) (de Goes & James 2017, eq. 9); `falloff` picks one,
    two or three radii (their sec. 5).

    center : (3,) float64, radius : float (the regularization radius eps), move : (3,) float64,
    poisson : float in (-1, 0.5], falloff : "wide" | "medium" | "tight".
    """

    kind = "grab"

    def __init__(self, center, radius, move, *, poisson=0.5, falloff="wide"):
        super().__init__(center, radius, poisson=poisson, falloff=falloff)
        self.move = checks.vector("move", move)
        norm = kernels.center_value("grab", self._eps, self._w, self._beta)
        self._wn = self._w / norm  # weights carrying the centre normalization

    def params(self):
        return {**self._base_params(), "move": self.move.tolist(), **self._tail_params()}

    def displacement(self, points, out=None):
        """u (n, 3) float64 at `points` (n, 3) float32 or float64; written into `out` if given."""
        return kernels.grab_displacement(points, self.center, self.move, self._eps, self._wn, self._beta, out)

    def jacobian(self, points):
        """J (n, 3, 3) float64, J[i, a, b] = d u_a / d x_b, in closed form."""
        return kernels.grab_jacobian(points, self.center, self.move, self._eps, self._wn, self._beta)

    def response(self, points):
        """K (n, 3, 3) float64 with displacement = K @ move for this centre, radius and material.

        A drag that keeps the centre fixed only changes `move`, so K can be computed once.
        """
        return kernels.grab_response(points, self.center, self._eps, self._wn, self._beta)

    def lipschitz(self):
        return float(np.linalg.norm(self.move)) / self.radius * kernels.gradient_bound("grab", self.falloff, self.poisson)

    def reach(self, tol):
        m = float(np.linalg.norm(self.move))
        return kernels.grab_reach(tol, self._eps, self._wn, self._beta, m)

    def pin_clearance(self):
        return [(self.center, self.center + self.move)]

    def velocity(self, points, t, out=None):
        """The grab carried along its own motion: the centre sits at center + t * move."""
        c = self.center + t * self.move
        return kernels.grab_displacement(points, c, self.move, self._eps, self._wn, self._beta, out)

    def fused_flow(self, points, *, steps):
        """The RK4 flow of `velocity` (centre carried along) in one pass per point
        (`brushes.kernels.flow_derive`); None for a subclass, whose field may differ."""
        if type(self) is not Grab:
            return None
        pts = np.ascontiguousarray(points, dtype=np.float64)
        return flow_kernels.grab_flow(pts, self.center, self.move, self._eps, self._wn, self._beta, steps)

    def kernel_load(self):
        if type(self) is not Grab:
            return None
        return KernelLoad("grab", self.center, self.move, self._eps, self._wn, float(self._beta))

    def point_loads(self, t):
        """One force, the move, at the centre carried to center + t * move (None for a subclass)."""
        if type(self) is not Grab:
            return None
        return PointLoads((self.center + t * self.move)[None, :], self.move[None, :], np.zeros((1, 3)),
                          np.asarray(self._eps, dtype=np.float64)[None, :],
                          np.asarray(self._wn, dtype=np.float64)[None, :], float(self._beta))


class _Affine(_Kelvinlet):
    """A locally affine brush: the Kelvinlet's gradient contracted with a 3x3 load F (de Goes &
    James 2017, sec. 4), with F chosen so that `jacobian(center)` is the requested matrix."""

    def _set_gradient(self, grad):
        """Solve for the load F whose centre Jacobian is `grad` (3, 3)."""
        self._grad = grad
        self._load = self._load_for(grad)

    def _load_for(self, grad):
        """The load F whose centre Jacobian is this brush's own part of `grad` (3, 3).

        Each brush is one pure kind, so only its part is kept: a round-off trace of a pinch
        gradient must not be divided by the scale constant, which is 0 at poisson 0.5.
        """
        part = {"twist": 0.5 * (grad - grad.T),
                "scale": np.trace(grad) / 3.0 * np.eye(3),
                "pinch": 0.5 * (grad + grad.T) - np.trace(grad) / 3.0 * np.eye(3)}[self.kind]
        return part / kernels.center_value(self.kind, self._eps, self._w, self._beta)

    def displacement(self, points, out=None):
        """u (n, 3) float64 at `points` (n, 3) float32 or float64; written into `out` if given."""
        return kernels.affine_displacement(points, self.center, self._load, self._eps, self._w, self._beta, out)

    def jacobian(self, points):
        """J (n, 3, 3) float64, J[i, a, b] = d u_a / d x_b, in closed form."""
        return kernels.affine_jacobian(points, self.center, self._load, self._eps, self._w, self._beta)

    def lipschitz(self):
        return self._bound_for(self._grad)

    def _bound_for(self, grad):
        unit = kernels.gradient_bound(self.kind, self.falloff, self.poisson)
        # pinch's table is per unit Frobenius norm of the gradient; twist and scale per unit rate
        size = float(np.linalg.norm(grad)) if self.kind == "pinch" else float(np.linalg.norm(grad, 2))
        return size * unit

    def reach(self, tol):
        return kernels.affine_reach(tol, self._eps, self._w, self._beta, self._load)

    # flow: the velocity field whose time-1 flow realizes the brush at its centre
    def flow_gradient(self):  # pragma: no cover - interface
        raise NotImplementedError

    def velocity(self, points, t, out=None):
        load = self._load_for(self.flow_gradient())
        return kernels.affine_displacement(points, self.center, load, self._eps, self._w, self._beta, out)

    def velocity_lipschitz(self):
        return self._bound_for(self.flow_gradient())

    def fused_flow(self, points, *, steps):
        """The RK4 flow of `velocity` (a fixed load) in one pass per point
        (`brushes.kernels.flow_derive`); None for a subclass, whose field may differ."""
        if type(self) not in (Twist, Scale, Pinch):
            return None
        load = self._load_for(self.flow_gradient())
        pts = np.ascontiguousarray(points, dtype=np.float64)
        return flow_kernels.affine_flow(pts, self.center, load, self._eps, self._w, self._beta, steps)

    def kernel_load(self):
        if type(self) not in (Twist, Scale, Pinch):
            return None
        return KernelLoad("affine", self.center, self._load, self._eps, self._w, float(self._beta))

    def fused_mirror_flow(self, points, *, steps, H, shift):
        """The brush and its image (centre H c + shift, load H F H) in one fused pass: the affine
        Kelvinlet is covariant, H u(H x + shift; c, F) = u(x; H c + shift, H F H)."""
        if type(self) not in (Twist, Scale, Pinch):
            return None
        load = self._load_for(self.flow_gradient())
        pts = np.ascontiguousarray(points, dtype=np.float64)
        return flow_kernels.affine_pair_flow(pts, self.center, load, H @ self.center + shift, H @ load @ H,
                                             self._eps, self._w, self._beta, steps)


class Twist(_Affine):
    """Twist: the skew part of the affine load. `jacobian(center) == radians(degrees) * [axis]x`.

    Near the centre, material turns by `degrees` about `axis` (right-hand rule); the field is
    u = w(|r|) (axis x r), the same for every Poisson's ratio.
    """

    kind = "twist"

    def __init__(self, center, radius, axis, degrees, *, poisson=0.5, falloff="wide"):
        super().__init__(center, radius, poisson=poisson, falloff=falloff)
        axis = checks.nonzero_vector("axis", axis)
        self.axis = axis / float(np.linalg.norm(axis))
        self._axis_given = axis
        self.degrees = checks.number("degrees", degrees)
        self._set_gradient(math.radians(self.degrees) * skew(self.axis))

    def params(self):
        return {**self._base_params(), "axis": self._axis_given.tolist(), "degrees": self.degrees,
                **self._tail_params()}

    def flow_gradient(self):
        return self._grad

    def exact_flow(self, points):
        """Closed-form flow: the field is w(|r|) (axis x r), so each point turns about the axis
        by an angle that depends only on its distance from the centre (Rodrigues' formula); one
        field evaluation for any angle."""
        if type(self) is not Twist:
            return None
        pts = np.ascontiguousarray(points, dtype=np.float64)
        return kernels.turn_about_axis(pts, self.center, self.axis, self.velocity(pts, 0.0))


class Scale(_Affine):
    """Scale: the isotropic part of the affine load. `jacobian(center) == (factor - 1) * I`.

    An incompressible material (poisson = 0.5) cannot change volume, so Scale needs poisson < 0.5.
    """

    kind = "scale"
    default_poisson = 0.3

    def __init__(self, center, radius, factor, *, poisson=0.3, falloff="wide"):
        super().__init__(center, radius, poisson=poisson, falloff=falloff)
        if self.poisson >= 0.5:
            raise checks.FieldError("poisson", "Scale needs Poisson's ratio below 0.5: an incompressible "
                                    "material (poisson = 0.5) cannot change volume")
        self.factor = checks.positive("factor", factor)
        self._set_gradient((self.factor - 1.0) * np.eye(3))

    def params(self):
        return {**self._base_params(), "factor": self.factor, **self._tail_params()}

    def flow_gradient(self):
        return math.log(self.factor) * np.eye(3)

    def _radial_rate(self, rho):
        """g(rho) of the velocity v = g(|r|) r at radii rho (k,)."""
        probe = self.center + np.outer(rho, [1.0, 0.0, 0.0])
        return self.velocity(probe, 0.0)[:, 0] / rho

    @functools.cached_property
    def radial_flow_table(self):
        """(radii (k,), spline of log(rho(1) / rho(0)) over log rho(0)), built once per brush.

        The radial ODE d rho / dt = g(rho) rho is integrated on 2001 radii from 1e-4 to 1e6
        radii with many small RK4 steps (1-D, cheap).
        """
        from scipy.interpolate import CubicSpline

        rho0 = self.radius * np.logspace(-4, 6, 2001)
        n_steps = max(64, math.ceil(40 * abs(math.log(self.factor))))
        h = 1.0 / n_steps
        rho = rho0.copy()
        f = lambda q: self._radial_rate(q) * q  # noqa: E731
        for _ in range(n_steps):
            k1 = f(rho)
            k2 = f(rho + 0.5 * h * k1)
            k3 = f(rho + 0.5 * h * k2)
            k4 = f(rho + h * k3)
            rho = rho + h / 6.0 * (k1 + 2 * k2 + 2 * k3 + k4)
        return rho0, CubicSpline(np.log(rho0), np.log(rho / rho0))

    def exact_flow(self, points):
        """Flow to table accuracy: the field is radial, g(|r|) r, so each point slides along its
        ray from the centre by the radial ODE's solution, solved once on a table of radii."""
        if type(self) is not Scale:
            return None
        _, spline = self.radial_flow_table
        knots = spline.x
        pts = np.ascontiguousarray(points, dtype=np.float64)
        # near the centre the core grows by exactly `factor` (log ratio -> log factor, error O(rho^2))
        out, far = kernels.slide_along_rays(pts, self.center, knots[0], (knots[-1] - knots[0]) / (len(knots) - 1),
                                            spline.c, math.log(self.factor))
        if far.any():  # past the table: g is tiny and nearly constant there
            r = pts[far] - self.center
            d = np.sqrt(np.einsum("ij,ij->i", r, r))
            out[far] = self.center + r * np.exp(self._radial_rate(d))[:, None]
        return out


class Pinch(_Affine):
    """Pinch: the symmetric traceless part of the affine load. `jacobian(center) == gradient`."""

    kind = "pinch"

    def __init__(self, center, radius, gradient, *, poisson=0.5, falloff="wide"):
        super().__init__(center, radius, poisson=poisson, falloff=falloff)
        g = checks.matrix3("gradient", gradient)
        scale = max(1.0, float(np.abs(g).max()))
        if not np.allclose(g, g.T, rtol=0, atol=1e-9 * scale):
            raise checks.FieldError("gradient", "must be symmetric (pinch is the symmetric traceless load)")
        if abs(np.trace(g)) > 1e-9 * scale:
            raise checks.FieldError("gradient", f"must be traceless (trace is {np.trace(g):.3g}); "
                                    "use Scale to change volume")
        self.gradient = g
        self._set_gradient(0.5 * (g + g.T) - np.trace(g) / 3.0 * np.eye(3))

    def params(self):
        return {**self._base_params(), "gradient": self.gradient.tolist(), **self._tail_params()}

    def flow_gradient(self):
        return self._grad
