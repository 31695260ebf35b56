"""Pins: counter-loads that hold chosen positions still.

A pinned brush field is the brush's field plus one regularized Kelvinlet (a grab-type point load,
de Goes & James 2017, eq. 9) at each pin, with loads solved from a small dense system so the total
field vanishes at every pin. The field stays a sum of elastic solutions.

Limits (checked, with a one-line error):
- a pin closer than `MIN_CENTER_GAP` radii to a grab's centre (or, in flow mode, to the path the
  centre travels): that point cannot both move by `move` and stay still;
- pins so close together that the solve's condition number exceeds `MAX_CONDITION`
  (in practice closer than about 1e-4 radii).
"""
from __future__ import annotations

import numpy as np
import scipy.linalg

from brushes import checks, kernels

MIN_CENTER_GAP = 0.25
MAX_CONDITION = 1e10


def check_pins(pins):
    """Convert and check `pins`: (m, 3) float64 finite; one point (3,) or an empty list is fine."""
    return np.ascontiguousarray(checks.points("pins", pins, allow_single=True, letter="m"))


class PinSolver:
    """Counter-loads at `pins` (m, 3) with regularization `radius` and Poisson's ratio `poisson`.

    `correction(points, field_at_pins)` gives the counter-field (n, 3) that cancels `field_at_pins`
    (m, 3) at the pins; `loads(field_at_pins)` the (m, 3) loads (as grab moves).
    """

    def __init__(self, pins, radius, poisson):
        self.pins = check_pins(pins)
        self.radius = float(radius)
        self.poisson = float(poisson)
        self._eps, w = kernels.scales("wide", self.radius)
        self._beta = kernels.beta_of(self.poisson)
        self._w = w / kernels.center_value("grab", self._eps, w, self._beta)
        m = len(self.pins)
        M = np.empty((3 * m, 3 * m))
        for j in range(m):
            K = kernels.grab_response(self.pins, self.pins[j], self._eps, self._w, self._beta)  # (m, 3, 3)
            M[:, 3 * j:3 * j + 3] = K.reshape(3 * m, 3)
        cond = np.linalg.cond(M)
        if not np.isfinite(cond) or cond > MAX_CONDITION:
            i, j, d = _closest_pair(self.pins)
            raise checks.FieldError(f"pins[{j}]", f"pins {i} and {j} are {d:.3g} apart, closer than the solve can separate "
                             f"(keep pins at least {1e-4 * self.radius:.3g}, 1e-4 radii, apart)")
        self._lu = scipy.linalg.lu_factor(M)
        self._unit_bound = kernels.gradient_bound("grab", "wide", self.poisson) / self.radius

    def loads(self, field_at_pins):
        rhs = -np.asarray(field_at_pins, dtype=np.float64).reshape(-1)
        return scipy.linalg.lu_solve(self._lu, rhs).reshape(-1, 3)

    def correction(self, points, loads, out=None):
        """Sum over pins of the grab field with move = load: (n, 3) float64 (added into `out`)."""
        total = np.zeros((len(points), 3)) if out is None else out
        buf = np.empty((len(points), 3))
        for p, f in zip(self.pins, loads):
            if np.any(f):
                total += kernels.grab_displacement(points, p, f, self._eps, self._w, self._beta, buf)
        return total

    def lipschitz(self, loads):
        """Bound of the counter-field's gradient norm for these loads."""
        return float(np.linalg.norm(loads, axis=1).sum()) * self._unit_bound


def check_centre_gap(pins, centers, radius):
    """Refuse pins within MIN_CENTER_GAP * radius of any point on the grab centre's path.

    centers : (k, 3) points of the path (start and end; the segment between them is checked).
    """
    a, b = centers[0], centers[-1]
    ab = b - a
    denom = float(ab @ ab)
    t = np.zeros(len(pins)) if denom == 0.0 else np.clip((pins - a) @ ab / denom, 0.0, 1.0)
    d = np.linalg.norm(pins - (a + t[:, None] * ab), axis=1)
    bad = np.flatnonzero(d < MIN_CENTER_GAP * radius)
    if bad.size:
        i = int(bad[0])
        raise checks.FieldError(f"pins[{i}]", f"pin {i} is {d[i]:.3g} from the grab's centre{' path' if denom else ''}, "
                         f"closer than {MIN_CENTER_GAP} radii: a point cannot both move and stay still")


def _closest_pair(pins):
    if len(pins) < 2:
        return 0, 0, 0.0
    d = np.linalg.norm(pins[:, None, :] - pins[None, :, :], axis=-1)
    np.fill_diagonal(d, np.inf)
    i, j = np.unravel_index(np.argmin(d), d.shape)
    return int(min(i, j)), int(max(i, j)), float(d[i, j])
