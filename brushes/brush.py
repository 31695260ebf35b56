"""The elastic brushes: `Brush` and the four regularized Kelvinlet brushes.

Each brush is a displacement field in space given in closed form by the generated kernels
(F. de Goes and D. L. James, "Regularized Kelvinlets: Sculpting Brushes based on Fundamental
Solutions of Elasticity", ACM Trans. Graph. 36(4), 2017). The classes only check arguments,
work out the elastic load that produces what the artist asked for at the brush centre, and
forward to `brushes.kernels`. Integration as a flow lives in `brushes.flow`.
"""
from __future__ import annotations

import functools
import math

import numpy as np

from brushes import kernels


def _finite_vector(name, value, length=3):
    try:
        arr = np.array(value, dtype=np.float64)
    except (TypeError, ValueError):
        raise ValueError(f"{name}: must be {length} numbers, got {value!r}") from None
    if arr.shape != (length,):
        raise ValueError(f"{name}: must be {length} numbers, got shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{name}: must be finite, got {arr.tolist()}")
    return arr


def _finite_number(name, value):
    if isinstance(value, bool):
        raise ValueError(f"{name}: must be a number, got {value!r}")
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name}: must be a number, got {value!r}") from None
    if not math.isfinite(v):
        raise ValueError(f"{name}: must be finite, got {value!r}")
    return v


def _positive(name, value):
    v = _finite_number(name, value)
    if v <= 0:
        raise ValueError(f"{name}: must be a positive number, got {value!r}")
    return v


def _poisson(value):
    v = _finite_number("poisson", value)
    if not (-1.0 < v <= 0.5):
        raise ValueError(f"poisson: Poisson's ratio must be in (-1, 0.5], got {value!r}")
    return v


def skew(axis):
    """[axis]x: the (3, 3) cross-product matrix, [axis]x @ v == cross(axis, v)."""
    a = np.asarray(axis, dtype=np.float64)
    return np.array([[0.0, -a[2], a[1]], [a[2], 0.0, -a[0]], [-a[1], a[0], 0.0]])


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

    def apply(self, points, *, flow=True, pins=None, mask=None):
        """New positions (n, 3) float64 of `points` under this brush.

        flow=False: points + displacement. flow=True: the brush integrated as a velocity field
        over pseudo-time [0, 1] with fold-free steps (see `brushes.flow`). `pins` (m, 3) stay
        still; `mask` (n,) in [0, 1] scales each point's motion.
        """
        from brushes import flow as _flow

        return _flow.apply(self, points, flow=flow, pins=pins, mask=mask)

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
        self.center = _finite_vector("center", center)
        self.radius = _positive("radius", radius)
        self.poisson = _poisson(poisson)
        self.falloff = falloff
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
        self.move = _finite_vector("move", move)
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

    def velocity(self, points, t, out=None):
        """The grab carried along its own motion: the centre sits at center + t * move."""
        c = self.center + t * self.move
        return kernels.grab_displacement(points, c, self.move, self._eps, self._wn, self._beta, out)


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


class Twist(_Affine):
    """Twist: the skew part of the affine load. `jacobian(center) == radians(degrees) * [axis]x`.

    Near the centre, material turns by `degrees` about `axis` (right-hand rule); the field is
    u = w(|r|) (axis x r), the same for every Poisson's ratio.
    """

    kind = "twist"

    def __init__(self, center, radius, axis, degrees, *, poisson=0.5, falloff="wide"):
        super().__init__(center, radius, poisson=poisson, falloff=falloff)
        axis = _finite_vector("axis", axis)
        n = float(np.linalg.norm(axis))
        if n == 0.0:
            raise ValueError("axis: must not be the zero vector")
        self.axis = axis / n
        self._axis_given = axis
        self.degrees = _finite_number("degrees", degrees)
        self._set_gradient(math.radians(self.degrees) * skew(self.axis))

    def params(self):
        return {**self._base_params(), "axis": self._axis_given.tolist(), "degrees": self.degrees,
                **self._tail_params()}

    def flow_gradient(self):
        return self._grad


class Scale(_Affine):
    """Scale: the isotropic part of the affine load. `jacobian(center) == (factor - 1) * I`.

    An incompressible material (poisson = 0.5) cannot change volume, so Scale needs poisson < 0.5.
    """

    kind = "scale"
    default_poisson = 0.3

    def __init__(self, center, radius, factor, *, poisson=0.3, falloff="wide"):
        super().__init__(center, radius, poisson=poisson, falloff=falloff)
        if self.poisson >= 0.5:
            raise ValueError("poisson: Scale needs Poisson's ratio below 0.5: an incompressible material "
                             "(poisson = 0.5) cannot change volume")
        self.factor = _positive("factor", factor)
        self._set_gradient((self.factor - 1.0) * np.eye(3))

    def params(self):
        return {**self._base_params(), "factor": self.factor, **self._tail_params()}

    def flow_gradient(self):
        return math.log(self.factor) * np.eye(3)

    @functools.cached_property
    def radial_flow_table(self):
        """The radial flow map's table (see `brushes.flow.radial_flow_table`), built once."""
        from brushes import flow as _flow

        return _flow.radial_flow_table(self)


class Pinch(_Affine):
    """Pinch: the symmetric traceless part of the affine load. `jacobian(center) == gradient`."""

    kind = "pinch"

    def __init__(self, center, radius, gradient, *, poisson=0.5, falloff="wide"):
        super().__init__(center, radius, poisson=poisson, falloff=falloff)
        try:
            g = np.array(gradient, dtype=np.float64)
        except (TypeError, ValueError):
            raise ValueError(f"gradient: must be a 3x3 matrix of numbers, got {gradient!r}") from None
        if g.shape != (3, 3):
            raise ValueError(f"gradient: must be a 3x3 matrix, got shape {g.shape}")
        if not np.all(np.isfinite(g)):
            raise ValueError("gradient: must be finite")
        scale = max(1.0, float(np.abs(g).max()))
        if not np.allclose(g, g.T, rtol=0, atol=1e-9 * scale):
            raise ValueError("gradient: must be symmetric (pinch is the symmetric traceless load)")
        if abs(np.trace(g)) > 1e-9 * scale:
            raise ValueError(f"gradient: must be traceless (trace is {np.trace(g):.3g}); use Scale to change volume")
        self.gradient = g
        self._set_gradient(0.5 * (g + g.T) - np.trace(g) / 3.0 * np.eye(3))

    def params(self):
        return {**self._base_params(), "gradient": self.gradient.tolist(), **self._tail_params()}

    def flow_gradient(self):
        return self._grad
