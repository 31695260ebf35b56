"""Tests of the fused RK4 flow kernels (`brushes/kernels/_flow_generated.py`, `Brush.fused_flow`).

The fused kernels must give what the flow's generic RK4 loop gives with the same steps, so the
generic loop (`brushes.flow`, reached through a subclass, which gets no fused flow) is one
reference; the other is outside the project: scipy's DOP853 integration of the same velocity.
"""
import numpy as np
import pytest
from scipy.integrate import solve_ivp

from brushes import flow
from brushes import kernels
from brushes.brush import Grab, Pinch, Scale, Twist
from brushes.handles import Handles
from brushes.kernels import _flow_generated, flow_derive
from brushes.mirror import Mirrored


class PlainGrab(Grab):
    """A subclass: the flow integrates it with its generic RK4 loop (no fused flow)."""


class PlainPinch(Pinch):
    """A subclass: the flow integrates it with its generic RK4 loop (no fused flow)."""


def points(seed, n=2000, spread=0.6):
    rng = np.random.default_rng(seed)
    return rng.normal(scale=spread, size=(n, 3))


def grab(cls, falloff="wide", poisson=0.5, move=(0.08, -0.03, 0.05)):
    return cls([0.1, -0.05, 0.2], 0.3, move, poisson=poisson, falloff=falloff)


def pinch(cls, falloff="wide", poisson=0.5, strength=0.8):
    g = strength * np.array([[1.0, 0.3, 0.0], [0.3, -0.4, 0.2], [0.0, 0.2, -0.6]])
    return cls([0.0, 0.1, -0.1], 0.35, g, poisson=poisson, falloff=falloff)


def gap(a, b, rest):
    """Largest difference of a and b over the largest motion of b from rest."""
    return float(np.abs(a - b).max() / np.abs(b - rest).max())


@pytest.fixture(params=["numba", "numpy"])
def backend(request, monkeypatch):
    """Run a test on each backend of the fused kernels (numpy as with PLIANT_BACKEND=numpy)."""
    if request.param == "numpy":
        monkeypatch.setenv("PLIANT_BACKEND", "numpy")
        monkeypatch.setattr(_flow_generated, "_NUMBA", None)
    yield request.param
    monkeypatch.setattr(_flow_generated, "_NUMBA", None)


@pytest.mark.parametrize("falloff", ["wide", "medium", "tight"])
@pytest.mark.parametrize("poisson", [0.5, 0.2, -0.5])
@pytest.mark.parametrize("move", [(0.08, -0.03, 0.05), (0.5, 0.2, -0.3)])  # one step and several
def test_fused_grab_matches_generic_rk4(backend, falloff, poisson, move):
    x = points(1)
    fused_stats, plain_stats = flow.FlowStats(), flow.FlowStats()
    fused = grab(Grab, falloff, poisson, move).apply(x, stats=fused_stats)
    plain = grab(PlainGrab, falloff, poisson, move).apply(x, stats=plain_stats)
    assert fused_stats == plain_stats  # the step count is the one steps_for picks
    assert gap(fused, plain, x) < 1e-12


@pytest.mark.parametrize("falloff", ["wide", "medium", "tight"])
@pytest.mark.parametrize("strength", [0.3, 2.5])
def test_fused_pinch_matches_generic_rk4(backend, falloff, strength):
    x = points(2)
    fused_stats, plain_stats = flow.FlowStats(), flow.FlowStats()
    fused = pinch(Pinch, falloff, strength=strength).apply(x, stats=fused_stats)
    plain = pinch(PlainPinch, falloff, strength=strength).apply(x, stats=plain_stats)
    assert fused_stats == plain_stats
    assert gap(fused, plain, x) < 1e-12


def test_several_steps_are_taken():
    """The second move above needs more than one RK4 step (else the loop over steps is untested)."""
    stats = flow.FlowStats()
    grab(Grab, move=(0.5, 0.2, -0.3)).apply(points(1), stats=stats)
    assert stats.steps > 1


def test_numba_matches_numpy_backend(monkeypatch):
    x = points(3, n=3001)  # not a multiple of the block size
    b = grab(Grab, "medium", 0.3, (0.4, 0.1, 0.0))
    p = pinch(Pinch, "tight", strength=1.5)
    fast = b.fused_flow(x, steps=3), p.fused_flow(x, steps=2)
    monkeypatch.setenv("PLIANT_BACKEND", "numpy")
    monkeypatch.setattr(_flow_generated, "_NUMBA", None)
    slow = b.fused_flow(x, steps=3), p.fused_flow(x, steps=2)
    monkeypatch.setattr(_flow_generated, "_NUMBA", None)
    for a, c in zip(fast, slow):
        assert gap(a, c, x) < 1e-12


def test_fused_flow_matches_scipy_dop853():
    """Outside reference: scipy's DOP853 at rtol 1e-10 on the same velocity field; RK4 with the
    flow's steps is held to the engine's accuracy target (about 1e-4 of the motion)."""
    x = points(4, n=40)
    for b in (grab(Grab, "wide", 0.5, (0.5, 0.2, -0.3)), pinch(Pinch, "medium", strength=2.0)):
        sol = solve_ivp(lambda t, y: b.velocity(y.reshape(-1, 3), t).ravel(), (0.0, 1.0), x.ravel(),
                        method="DOP853", rtol=1e-10, atol=1e-12)
        ref = sol.y[:, -1].reshape(-1, 3)
        assert gap(b.apply(x), ref, x) < 1e-4


def test_moving_everything_moves_the_result():
    """Translation invariance (the field depends on x - centre only)."""
    x = points(5, n=500)
    d = np.array([3.0, -2.0, 5.0])
    a = grab(Grab).apply(x)
    b = Grab(grab(Grab).center + d, 0.3, (0.08, -0.03, 0.05)).apply(x + d)
    assert np.abs((b - d) - a).max() < 1e-12


def test_grab_centre_lands_on_centre_plus_move():
    """The grab's defining property ([dGJ17] normalization, carried by the flow)."""
    b = grab(Grab, move=(0.2, 0.1, -0.1))
    out = b.apply(b.center[None, :])
    assert np.allclose(out[0], b.center + b.move, atol=1e-6)


def test_pins_mirror_and_subclasses_keep_the_generic_path(monkeypatch):
    calls = []
    real = Grab.fused_flow

    def spy(self, pts, *, steps):
        calls.append(steps)
        return real(self, pts, steps=steps)

    monkeypatch.setattr(Grab, "fused_flow", spy)
    b = grab(Grab)
    x = points(6, n=300)
    b.apply(x, pins=[[0.9, 0.9, 0.9]])
    assert calls == []
    b.apply(x)
    assert len(calls) == 1
    assert PlainGrab([0, 0, 0], 0.3, [0.1, 0, 0]).fused_flow(x, steps=1) is None
    # a mirrored grab is two point loads (the loads kernel); a mirrored affine brush is fused
    assert Mirrored(b, [1.0, 0.0, 0.0]).point_loads(0.5) is not None
    assert Mirrored(pinch(Pinch), [1.0, 0.0, 0.0]).fused_flow(x, steps=1) is not None
    assert Mirrored(PlainGrab([0, 0, 0], 0.3, [0.1, 0, 0]), [1.0, 0.0, 0.0]).point_loads(0.5) is None
    assert Mirrored(PlainPinch([0, 0, 0], 0.3, np.diag([0.2, -0.2, 0.0])), [1.0, 0.0, 0.0]).fused_flow(x, steps=1) is None
    assert PlainMirrored(b, [1.0, 0.0, 0.0]).point_loads(0.5) is None
    assert PlainMirrored(pinch(Pinch), [1.0, 0.0, 0.0]).fused_flow(x, steps=1) is None


class PlainMirrored(Mirrored):
    """A subclass: the flow integrates the brush and its image with its generic RK4 loop."""


MIRRORED = [("grab", lambda fo: grab(Grab, fo, 0.3, (0.5, 0.2, -0.3))),
            ("twist", lambda fo: Twist([0.1, -0.05, 0.2], 0.3, [0.2, 1.0, 0.4], 70.0, falloff=fo)),
            ("scale", lambda fo: Scale([0.1, -0.05, 0.2], 0.3, 1.4, falloff=fo)),
            ("pinch", lambda fo: pinch(Pinch, fo, strength=1.5))]


@pytest.mark.parametrize("falloff", ["wide", "medium", "tight"])
@pytest.mark.parametrize("kind, make", MIRRORED, ids=[k for k, _ in MIRRORED])
@pytest.mark.parametrize("plane", [([1.0, 0.2, -0.3], [0.25, 0.0, 0.0]), ([0.0, 1.0, 0.0], [0.0, -0.05, 0.0])],
                         ids=["apart", "centre on the plane"])
def test_fused_mirror_matches_generic_rk4(backend, falloff, kind, make, plane):
    x = points(9, n=1500)
    fused_stats, plain_stats = flow.FlowStats(), flow.FlowStats()
    fused = Mirrored(make(falloff), *plane).apply(x, stats=fused_stats)
    plain = PlainMirrored(make(falloff), *plane).apply(x, stats=plain_stats)
    assert fused_stats == plain_stats
    assert gap(fused, plain, x) < 1e-12


def test_fused_mirror_matches_scipy_dop853_and_is_symmetric():
    """Outside reference: scipy's DOP853 on the mirrored velocity; and the result of a mirrored
    stroke on mirrored points is the mirror of the result (hand identity of a reflection)."""
    x = points(10, n=40)
    for make in (MIRRORED[0][1], MIRRORED[1][1]):
        b = Mirrored(make("wide"), [1.0, 0.2, -0.3], [0.25, 0.0, 0.0])
        sol = solve_ivp(lambda t, y: b.velocity(y.reshape(-1, 3), t).ravel(), (0.0, 1.0), x.ravel(),
                        method="DOP853", rtol=1e-10, atol=1e-12)
        assert gap(b.apply(x), sol.y[:, -1].reshape(-1, 3), x) < 1e-4
        assert np.abs(b.apply(b.reflect(x)) - b.reflect(b.apply(x))).max() < 1e-12


class PlainHandles(Handles):
    """A subclass: no point loads, so the flow's generic RK4 loop."""


def handles(cls, rotations=None, falloff="wide"):
    return cls([[0.1, -0.05, 0.2], [-0.4, 0.1, 0.0], [0.2, 0.5, -0.3]], [0.3, 0.25, 0.35],
               [[0.3, 0.1, -0.1], [0.0, 0.0, 0.0], [-0.1, 0.2, 0.0]], rotations=rotations, falloff=falloff)


PIN = [[0.6, -0.5, 0.4], [-0.5, -0.6, 0.5]]
LOADED = [
    ("grab + pins", lambda fo: grab(Grab, fo, 0.3, (0.4, 0.1, -0.2)), lambda fo: grab(PlainGrab, fo, 0.3, (0.4, 0.1, -0.2)), PIN),
    ("mirrored grab + pins", lambda fo: Mirrored(grab(Grab, fo), [0.0, 0.0, 1.0], [0.0, 0.0, -0.3]),
     lambda fo: PlainMirrored(grab(Grab, fo), [0.0, 0.0, 1.0], [0.0, 0.0, -0.3]), PIN[:1]),
    ("handles", lambda fo: handles(Handles, falloff=fo), lambda fo: handles(PlainHandles, falloff=fo), None),
    ("turned handles", lambda fo: handles(Handles, [[0, 0, 40], [0, 0, 0], [10, -20, 0]], fo),
     lambda fo: handles(PlainHandles, [[0, 0, 40], [0, 0, 0], [10, -20, 0]], fo), None),
    ("mirrored turned handles", lambda fo: Mirrored(handles(Handles, [[0, 0, 40], [0, 0, 0], [10, -20, 0]], fo),
                                                    [1.0, 0.3, 0.0], [0.9, 0.0, 0.0]),
     lambda fo: PlainMirrored(handles(Handles, [[0, 0, 40], [0, 0, 0], [10, -20, 0]], fo),
                              [1.0, 0.3, 0.0], [0.9, 0.0, 0.0]), None),
    ("handles + pins", lambda fo: handles(Handles, falloff=fo), lambda fo: handles(PlainHandles, falloff=fo), PIN),
]


@pytest.mark.parametrize("falloff", ["wide", "tight"])
@pytest.mark.parametrize("name, make, plain, pins", LOADED, ids=[c[0] for c in LOADED])
def test_fused_point_loads_match_generic_rk4(backend, falloff, name, make, plain, pins):
    # Brushes made of point loads (and pins' counter-loads) run fused (`Brush.point_loads`,
    # ``loads_flow``); their subclasses take the generic loop: the two must agree to rounding.
    x = points(11, n=1300)
    fused_stats, plain_stats = flow.FlowStats(), flow.FlowStats()
    fused = make(falloff).apply(x, pins=pins, stats=fused_stats)
    reference = plain(falloff).apply(x, pins=pins, stats=plain_stats)
    assert fused_stats == plain_stats
    assert gap(fused, reference, x) < 1e-12


@pytest.mark.parametrize("name, make", [(c[0], c[1]) for c in LOADED], ids=[c[0] for c in LOADED])
def test_point_loads_sum_to_the_velocity(name, make):
    b = make("medium")
    x = points(12, n=200)
    for t in (0.0, 0.37, 1.0):
        loads = b.point_loads(t)
        u = np.zeros_like(x)
        for l in range(len(loads.centers)):  # each load through the handles' kernel alone
            u += kernels.handles_displacement(x, loads.centers[l:l + 1], loads.forces[l:l + 1],
                                              loads.torques[l:l + 1], loads.eps[l:l + 1], loads.weights[l],
                                              loads.beta)
        v = b.velocity(x, t)
        assert np.abs(u - v).max() < 1e-12 * np.abs(v).max()


def test_loads_flow_refuses_bad_shapes():
    x = points(13, n=10)
    c = np.zeros((3, 1, 3))
    eps, w = np.full((1, 1), 0.3), np.ones((1, 1))
    with pytest.raises(ValueError, match="centers"):
        _flow_generated.loads_flow(x, c[:2], c[:2], c[:2], eps, w, 0.5, 1)
    with pytest.raises(ValueError, match="w"):
        _flow_generated.loads_flow(x, c, c, c, eps, np.ones((1, 2)), 0.5, 1)
    with pytest.raises(ValueError, match="eps"):
        _flow_generated.loads_flow(x, c, c, c, np.full((2, 1), 0.3), np.ones((2, 1)), 0.5, 1)


class PlainTwist(Twist):
    """A subclass: no closed form and no fused flow, so the generic RK4 loop."""


class PlainScale(Scale):
    """A subclass: no closed form and no fused flow, so the generic RK4 loop."""


@pytest.mark.parametrize("cls, args", [(PlainTwist, ([0, 0, 0], 0.4, [0, 0, 1], 40.0)),
                                       (PlainScale, ([0, 0, 0], 0.4, 1.3))])
def test_twist_and_scale_fused_flows_equal_generic_rk4(cls, args):
    x = points(7, n=500)
    stats = flow.FlowStats()
    plain = cls(*args).apply(x, stats=stats)
    fused = cls.__mro__[1](*args).fused_flow(x, steps=stats.steps)
    assert gap(fused, plain, x) < 1e-12


def test_bad_arguments_are_refused():
    x = points(8, n=10)
    b = grab(Grab)
    with pytest.raises(ValueError, match="steps"):
        b.fused_flow(x, steps=0)
    with pytest.raises(ValueError, match="out"):
        _flow_generated.grab_flow(x, b.center, b.move, b._eps, b._wn, b._beta, 1, out=x)
    with pytest.raises(ValueError, match="points"):
        _flow_generated.grab_flow(x.astype(np.float32), b.center, b.move, b._eps, b._wn, b._beta, 1)


def test_generated_file_matches_its_generator():
    with open(flow_derive.flow_kernels_path(), encoding="utf-8") as fh:
        assert fh.read() == flow_derive.generate()
