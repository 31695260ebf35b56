"""Pins: counter-loads that hold chosen positions still.

A pinned brush field is the brush's field plus one regularized Kelvinlet (a grab-type point load,
de Goes & James 2017, eq. 9) at each pin, with loads solved from a small dense system so the total
field vanishes at every pin. The field stays a sum of elastic solutions. Pins are handles that do
not move: the solve is the handles' own (`brushes.handles.LoadSolver`), and a Handles brush takes
its pins into its own solve (`Handles.pinned`) so its handles still reach their targets.

Limits (checked, with a one-line error):
- a pin closer than `MIN_CENTER_GAP` radii to a grab's centre (or, in flow mode, to the path the
  centre travels): that point cannot both move by `move` and stay still;
- pins so close together that the solve's condition number exceeds `MAX_CONDITION`
  (in practice closer than about 1e-4 radii).
"""
from __future__ import annotations

import numpy as np

from brushes import checks, handles, kernels

MIN_CENTER_GAP = handles.MIN_CENTER_GAP
MAX_CONDITION = handles.MAX_CONDITION


def check_pins(pins):
    """Convert and check `pins`: (m, 3) float64 finite; one point (3,) or an empty list is fine."""
    return np.ascontiguousarray(checks.points("pins", pins, allow_single=True, letter="m"))


def _refuse(radius):
    def refuse(i, j, d):
        return checks.FieldError(f"pins[{j}]", f"pins {i} and {j} are {d:.3g} apart, closer than the solve can "
                                 f"separate (keep pins at least {handles.SEPARATION * radius:.3g}, 1e-4 radii, "
                                 "apart)")
    return refuse


class PinSolver:
    """Counter-loads at `pins` (m, 3) with regularization `radius` and Poisson's ratio `poisson`.

    Pins are handles that do not move: the loads come from the handles' solver
    (`brushes.handles.LoadSolver`, wide falloff, no twist loads) with targets that cancel the
    brush's field. `correction(points, loads)` gives the counter-field (n, 3); `loads(field_at_pins)`
    the (m, 3) loads (as grab moves) that cancel `field_at_pins` (m, 3) at the pins.
    """

    def __init__(self, pins, radius, poisson):
        self.pins = check_pins(pins)
        self.radius = float(radius)
        self.poisson = float(poisson)
        self._solver = handles.LoadSolver(self.pins, self.radius, poisson=self.poisson, falloff="wide",
                                          refuse=_refuse(self.radius))
        self._unit_bound = kernels.gradient_bound("grab", "wide", self.poisson) / self.radius

    def loads(self, field_at_pins):
        return self._solver.solve(-np.asarray(field_at_pins, dtype=np.float64).reshape(-1, 3))[0]

    def correction(self, points, loads, out=None):
        """Sum over pins of the grab field with move = load: (n, 3) float64 (added into `out`)."""
        u = self._solver.field(points, (loads, np.zeros_like(loads)))
        if out is None:
            return u
        out += u
        return out

    def point_loads(self, field_at_pins):
        """The counter-loads that cancel `field_at_pins` (m, 3), as `brushes.brush.PointLoads`."""
        loads = self.loads(field_at_pins)
        return self._solver.point_loads((loads, np.zeros_like(loads)))

    def lipschitz(self, loads):
        """Bound of the counter-field's gradient norm for these loads: the sum of each load's own bound."""
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
