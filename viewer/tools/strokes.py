"""The brush tools: grab, twist, scale and pinch strokes (one drag, one recipe stroke).

While the button is down the surface shows a cheap preview, the brush's one-step displacement
(``flow=False``) evaluated only on vertices nearer the centre than ``brush.reach(tol)``, the
engine's proven bound beyond which every vertex moves less than ``tol``; a plain grab reuses
``Grab.response`` computed once per press (displacement = response @ move, one fused numba
pass when numba imports). On release the drag becomes one recipe stroke, and the committed
positions are exactly :func:`brushes.recipe.apply_stroke` of that stroke on the positions at
the press, the same call a recipe replay makes.
"""

from __future__ import annotations

import functools

import numpy as np

from brushes import checks
from viewer import gesture
from viewer.tools.base import Tool

__all__ = ["Grab", "Twist", "Scale", "Pinch", "BrushTool", "grab_preview"]

MOD_SHIFT = 1  # pyglet.window.key.MOD_SHIFT (viewer.session compares the values with pyglet's)


def _grab_preview_numpy(response, move, base_sorted, order, count, touched, shown, weights):
    k = response[:count]
    displacement = k[:, :, 0] * move[0] + k[:, :, 1] * move[1] + k[:, :, 2] * move[2]
    if weights is not None:
        displacement *= weights[:count, None]
    shown[order[:count]] = base_sorted[:count] + displacement
    shown[order[count:touched]] = base_sorted[count:touched]


@functools.lru_cache(maxsize=1)
def _grab_preview_numba():
    """The compiled preview kernel, or None without numba or with ``PLIANT_BACKEND=numpy``."""
    from brushes.kernels import numba_module

    numba = numba_module()
    if numba is None:
        return None

    @numba.njit(cache=True, nogil=True)
    def preview(response, move, base_sorted, order, count, touched, shown, weights, weighted):
        m0, m1, m2 = move[0], move[1], move[2]
        for i in range(count):
            w = weights[i] if weighted else 1.0
            j = order[i]
            for a in range(3):
                d = response[i, a, 0] * m0 + response[i, a, 1] * m1 + response[i, a, 2] * m2
                shown[j, a] = base_sorted[i, a] + w * d
        for i in range(count, touched):
            j = order[i]
            for a in range(3):
                shown[j, a] = base_sorted[i, a]

    return preview


def grab_preview(response, move, base_sorted, order, count, touched, shown, *, weights=None,
                 backend=None):
    """Write a grab's one-step preview into ``shown`` in place (the viewer's drag update).

    Vertices are handled in order of distance from the brush centre, so those within the
    brush's reach are the first ``count`` slots:
    ``shown[order[i]] = base_sorted[i] + weights[i] * response[i] @ move`` for ``i < count``,
    and slots ``count <= i < touched`` (moved by the previous update, now out of reach) go
    back to ``base_sorted[i]``.

    Parameters
    ----------
    response : (k, 3, 3) float32 or float64, k >= count
        ``brushes.Grab.response`` of the distance-sorted press positions.
    move : (3,) float
    base_sorted : (n, 3) float64
        Press positions in distance order.
    order : (n,) int
        Slot -> vertex index.
    count, touched : int
    shown : (n, 3) float64
        Written in place (vertex order).
    weights : (n,) float64 in distance order, optional, keyword-only
        Mask weights (1 moves freely, 0 holds).
    backend : {"numba", "numpy", None}, keyword-only
        None takes numba when it imports (one fused pass), else numpy.
    """
    move = checks.vector("move", move)
    count, touched = int(count), int(touched)
    if not 0 <= count <= len(response):
        raise checks.FieldError("count", f"must lie in [0, {len(response)}], got {count}")
    if backend is not None:
        checks.choice("backend", backend, ("numba", "numpy"))
    kernel = None if backend == "numpy" else _grab_preview_numba()
    if backend == "numba" and kernel is None:
        raise checks.FieldError("backend", "numba is not available (missing, or PLIANT_BACKEND=numpy)")
    if kernel is None:
        _grab_preview_numpy(response, move, base_sorted, order, count, touched, shown, weights)
    else:
        kernel(response, move, base_sorted, order, count, max(touched, count), shown,
               weights if weights is not None else np.ones(1), weights is not None)


def _within(sorted_distance, reach):
    """How many of the ascending distances lie below ``reach`` (all of them for inf)."""
    return int(np.searchsorted(sorted_distance, float(reach), side="left"))


class _Stroke:
    """A brush drag in progress: the press, the settings fixed at the press, and the preview."""

    def __init__(self, **data):
        self.__dict__.update(data)


class BrushTool(Tool):
    """Shared stroke logic of the four brushes; a subclass sets ``name``, ``key``, ``summary``."""

    brush = True
    edits = True

    @property
    def label(self):
        return f"{self.name} brush"

    # ------------------------------------------------------------------ the tool contract
    def press(self, session, start, hit, modifiers):
        base = np.array(session.history.points)  # a writable copy of the positions at the press
        center = np.asarray(hit.point, dtype=np.float64)
        offsets = base - center
        distance = np.sqrt(np.einsum("ij,ij->i", offsets, offsets))
        # Vertices sorted by distance from the centre: the ones inside a reach are a prefix.
        order = np.argsort(distance, kind="stable")
        inverse = np.empty_like(order)
        inverse[order] = np.arange(len(order))
        base_sorted = base.take(order, axis=0)
        pins = [list(map(float, p)) for p in session.pins] or None
        plane = session.mirror_plane()
        mirror = None if plane is None else {"normal": plane[0].tolist(), "point": plane[1].tolist()}
        mask = {"weights": (1.0 - session.hold).tolist()} if np.any(session.hold > 0) else None
        state = _Stroke(
            kind=self.name, start=start, current=start, center=center,
            normal=np.asarray(hit.normal), base=base, order=order, inverse=inverse,
            base_sorted=base_sorted, shown=base.copy(), shown_sorted=base_sorted.copy(),
            sorted_distance=distance[order], params=None, invert=bool(modifiers & MOD_SHIFT),
            touched=None, touched_count=0, response=None, weights=None, weights_sorted=None,
            # Settings are fixed for the whole stroke (a key or wheel mid-drag changes the
            # next stroke, not this one or its cached response).
            radius=session.radius, falloff=session.falloff, poisson=session.poisson[self.name],
            pins=pins, mirror=mirror, mask=mask, plane=plane)
        if mask is not None:
            state.weights = np.asarray(mask["weights"])
            state.weights_sorted = state.weights[order]
        if plane is not None:
            normal, point = plane
            reflected = center - 2.0 * ((center - point) @ normal) * normal
            mirror_distance = np.linalg.norm(base - reflected, axis=1)
            state.mirror_order = np.argsort(mirror_distance, kind="stable")
            state.mirror_sorted_distance = mirror_distance[state.mirror_order]
        session.show(state.shown)
        return state

    def drag(self, session, state, point, modifiers):
        state.invert = bool(modifiers & MOD_SHIFT)
        self._update(session, state, point)

    def release(self, session, state, point, modifiers):
        if point != state.current:
            state.invert = bool(modifiers & MOD_SHIFT)
            self._update(session, state, point)
        if state.params is None or state.current == state.start:
            session.restore()
            return
        session.commit(self.stroke(state).to_dict())

    def cancel(self, session, state):
        session.restore()

    def outline(self, session, state):
        center = state.center
        if state.params is not None and state.params.get("move") is not None:
            center = center + np.asarray(state.params["move"])
        return center, state.radius

    # ------------------------------------------------------------------ strokes
    @staticmethod
    def brush_kwargs(state):
        """The brush's keyword arguments: the gesture's, plus the material fixed at the press."""
        kwargs = {k: v for k, v in state.params.items() if k != "kind"}
        kwargs["poisson"] = state.poisson
        kwargs["falloff"] = state.falloff
        return kwargs

    def stroke(self, state, *, flow=True):
        """The :class:`brushes.recipe.Stroke` the drag stands for now."""
        from brushes.recipe import Stroke
        return Stroke(state.kind, self.brush_kwargs(state), flow=flow, pins=state.pins,
                      mirror=state.mirror, mask=state.mask)

    def _brush(self, state):
        from brushes import registry
        return registry.lookup(state.kind)(**self.brush_kwargs(state))

    def _update(self, session, state, current):
        """Recompute the preview for the drag now at window point ``current``."""
        state.current = current
        state.params = gesture.drag_params(state.kind, session.camera, state.center,
                                           state.radius, state.start, current, session.width,
                                           session.height, invert=state.invert)
        if state.pins is not None:
            # Pins need the engine's counter-loads: preview with the stroke itself, one step
            # (flow=False) on every vertex.
            state.shown = self.stroke(state, flow=False).apply(state.base, groups=session.groups)
            session.show(state.shown)
            return
        brush = self._brush(state)
        tolerance = session.tolerance
        if state.plane is None:
            # Work on the distance-sorted copy: the vertices within reach are its first
            # `count` rows, so no scattered indexing is needed until the final reordering.
            count = _within(state.sorted_distance, brush.reach(tolerance))
            if state.kind == "grab":
                grab_preview(self._grab_response(state, count), state.params["move"],
                             state.base_sorted, state.order, count, state.touched_count,
                             state.shown, weights=state.weights_sorted)
                state.touched_count = count
                session.show(state.shown)
                return
            displacement = brush.displacement(state.base_sorted[:count])
            if state.weights_sorted is not None:
                displacement = displacement * state.weights_sorted[:count, None]
            np.add(state.base_sorted[:count], displacement, out=state.shown_sorted[:count])
            # Rows moved last time but now beyond the reach go back to the press positions.
            state.shown_sorted[count:state.touched_count] = state.base_sorted[count:state.touched_count]
            state.touched_count = count
            np.take(state.shown_sorted, state.inverse, axis=0, out=state.shown)
            session.show(state.shown)
            return
        # Brush and reflection each move a vertex by less than tol/2 beyond their reach (the
        # engine's bound), so together by less than tol outside both balls.
        from brushes import mirror as mirror_brush
        reach = brush.reach(0.5 * tolerance)
        near = np.zeros(len(state.base), dtype=bool)
        near[state.order[: _within(state.sorted_distance, reach)]] = True
        near[state.mirror_order[: _within(state.mirror_sorted_distance, reach)]] = True
        idx = np.flatnonzero(near)
        points = state.base.take(idx, axis=0)
        displacement = mirror_brush(brush, state.plane[0], state.plane[1]).displacement(points)
        if state.weights is not None:
            displacement = displacement * state.weights[idx, None]
        if state.touched is not None:
            state.shown[state.touched] = state.base.take(state.touched, axis=0)
        state.shown[idx] = points + displacement
        state.touched = idx
        session.show(state.shown)

    @staticmethod
    def _grab_response(state, count):
        """``brushes.Grab.response`` of the first ``count`` distance-sorted press positions,
        (>= count, 3, 3) float32, computed lazily for as many vertices as the reach has asked
        for so far (float32 is plenty for a preview and halves the memory traffic)."""
        done = 0 if state.response is None else len(state.response)
        if count > done:
            import brushes
            probe = brushes.Grab(state.center, state.radius, [0.0, 0.0, 0.0],
                                 poisson=state.poisson, falloff=state.falloff)
            extra = np.asarray(probe.response(state.base_sorted[done:count]), dtype=np.float32)
            state.response = extra if state.response is None else np.concatenate(
                [state.response, extra])
        return state.response


class Grab(BrushTool):
    name = "grab"
    key = "1"
    summary = "grab brush: drag the surface along with the cursor"


class Twist(BrushTool):
    name = "twist"
    key = "2"
    summary = "twist brush: drag sideways to turn the surface about the view axis"


class Scale(BrushTool):
    name = "scale"
    key = "3"
    summary = "scale brush: drag up to swell, down to shrink"


class Pinch(BrushTool):
    name = "pinch"
    key = "4"
    summary = "pinch brush: drag to stretch along the drag (Shift: squeeze along it)"
