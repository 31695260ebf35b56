"""Tests for brushes.handles: several handles driven to their targets by one solved elastic field.

Outside references: a slow reference field rebuilt here from the public Grab and Twist brushes
and numpy's dense solve; the definition of the targets (displacement at the handles, and half
the curl of the displacement by central differences = the rotation vector of
scipy.spatial.transform.Rotation); Grab and Twist themselves for one handle; scipy's DOP853
integration of the same velocity field; trimesh's volumes and vertex normals; the command run as
a subprocess.
"""
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import trimesh
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.integrate import solve_ivp
from scipy.spatial.transform import Rotation

import brushes
from brushes import kernels
from brushes.checks import FieldError
from brushes.flow import FOLD_FREE_HL
from brushes.kernels import _generated as gen

ROOT = Path(__file__).resolve().parents[1]
SETTINGS = settings(max_examples=12, deadline=None)
RADIUS = 0.3


def unit_rows(rng, k):
    v = rng.normal(size=(k, 3))
    return v / np.linalg.norm(v, axis=1, keepdims=True)


def spread(k, seed):
    """k well-spread points on the unit sphere (golden-angle spiral), turned at random."""
    i = np.arange(k) + 0.5
    phi, th = np.arccos(1 - 2 * i / k), np.pi * (1 + 5**0.5) * i
    p = np.stack([np.cos(th) * np.sin(phi), np.sin(th) * np.sin(phi), np.cos(phi)], axis=1)
    return Rotation.random(random_state=seed).apply(p)


def example(k=3, seed=0, rotations=True, radius=RADIUS, move_radii=1.0, degrees=60.0):
    rng = np.random.default_rng(seed)
    centers = spread(k, seed)
    moves = unit_rows(rng, k) * rng.uniform(0.2, 1.0, (k, 1)) * move_radii * np.min(radius)
    rots = unit_rows(rng, k) * rng.uniform(0.0, degrees, (k, 1)) if rotations else None
    return centers, moves, rots


def probes(centers, seed, n=80, radius=RADIUS):
    rng = np.random.default_rng(seed)
    base = centers[rng.integers(0, len(centers), n)]
    return base + radius * rng.normal(size=(n, 3)) * rng.choice([0.1, 0.5, 1.0, 2.0, 4.0], (n, 1))


def spin_by_differences(field, x, h):
    """Half the curl of `field` at points x (m, 3) by central differences: the skew part of the
    Jacobian as a vector (the definition of the local rotation rate)."""
    J = np.empty((len(x), 3, 3))
    for b in range(3):
        e = np.zeros(3)
        e[b] = h
        J[:, :, b] = (field(x + e) - field(x - e)) / (2 * h)
    return 0.5 * np.stack([J[:, 2, 1] - J[:, 1, 2], J[:, 0, 2] - J[:, 2, 0], J[:, 1, 0] - J[:, 0, 1]], axis=1)


# --- the slow reference: the same field built from public Grab and Twist brushes ---------------


def reference_loads(centers, radii, moves, rots, poisson, falloff):
    """Forces (k, 3) and twist loads (k, 3, radians) of Grab/Twist brushes at the centres whose
    summed field meets the targets: numpy's dense solve over columns measured on public brushes."""
    k = len(centers)
    spin = rots is not None
    cols = []
    for j in range(k):
        for e in np.eye(3):
            g = brushes.Grab(centers[j], radii[j], e, poisson=poisson, falloff=falloff)
            col = [g.displacement(centers).ravel()]
            if spin:
                J = g.jacobian(centers)
                col.append(0.5 * np.stack([J[:, 2, 1] - J[:, 1, 2], J[:, 0, 2] - J[:, 2, 0],
                                           J[:, 1, 0] - J[:, 0, 1]], axis=1).ravel())
            cols.append(np.concatenate(col))
    if spin:
        for j in range(k):
            for e in np.eye(3):
                t = brushes.Twist(centers[j], radii[j], e, np.degrees(1.0), poisson=poisson, falloff=falloff)
                J = t.jacobian(centers)
                cols.append(np.concatenate([t.displacement(centers).ravel(), 0.5 * np.stack(
                    [J[:, 2, 1] - J[:, 1, 2], J[:, 0, 2] - J[:, 2, 0], J[:, 1, 0] - J[:, 0, 1]], axis=1).ravel()]))
    M = np.array(cols).T
    rhs = moves.ravel() if not spin else np.concatenate([moves.ravel(), np.radians(rots).ravel()])
    x = np.linalg.solve(M, rhs)
    return x[:3 * k].reshape(k, 3), (x[3 * k:].reshape(k, 3) if spin else np.zeros((k, 3)))


def reference_field(x, centers, radii, forces, torques, poisson, falloff):
    u = np.zeros_like(x)
    for c, r, f, q in zip(centers, radii, forces, torques):
        u += brushes.Grab(c, r, f, poisson=poisson, falloff=falloff).displacement(x)
        if np.linalg.norm(q) > 0:
            u += brushes.Twist(c, r, q, np.degrees(np.linalg.norm(q)), poisson=poisson,
                               falloff=falloff).displacement(x)
    return u


# --- one handle is Grab; one turning handle is Twist ----------------------------------------------


@pytest.mark.parametrize("falloff", ["wide", "medium", "tight"])
@pytest.mark.parametrize("poisson", [0.5, 0.2, -0.5])
def test_one_handle_is_grab(falloff, poisson):
    c, m = np.array([0.2, -0.1, 0.4]), np.array([0.25, 0.1, -0.2])
    g = brushes.Grab(c, RADIUS, m, poisson=poisson, falloff=falloff)
    h = brushes.Handles([c], RADIUS, [m], poisson=poisson, falloff=falloff)
    x = probes(c[None], 1)
    scale = np.abs(g.displacement(x)).max()
    np.testing.assert_allclose(h.displacement(x), g.displacement(x), rtol=0, atol=1e-13 * scale)
    np.testing.assert_allclose(h.jacobian(x), g.jacobian(x), rtol=0, atol=1e-12)
    for flow in (False, True):
        np.testing.assert_allclose(h.apply(x, flow=flow), g.apply(x, flow=flow), rtol=0, atol=1e-12)
    assert h.lipschitz() == pytest.approx(g.lipschitz(), rel=1e-12)


def test_one_turning_handle_is_twist():
    c, axis = np.array([0.1, 0.0, -0.3]), np.array([1.0, 2.0, -0.5])
    rot = axis / np.linalg.norm(axis) * 75.0
    h = brushes.Handles(c, RADIUS, [0, 0, 0], rotations=rot)  # one (3,) point is one handle
    t = brushes.Twist(c, RADIUS, axis, 75.0)
    x = probes(c[None], 2)
    np.testing.assert_allclose(h.displacement(x), t.displacement(x), rtol=0, atol=1e-13)
    # Twist's closed-form flow (Rodrigues) against the handles' RK4 flow of the same field
    motion = np.linalg.norm(t.apply(x) - x, axis=1).max()
    assert np.abs(h.apply(x) - t.apply(x)).max() < 1e-4 * motion


# --- the targets, against their definition ---------------------------------------------------------


@pytest.mark.parametrize("falloff", ["wide", "tight"])
@pytest.mark.parametrize("k", [1, 2, 5, 8])
def test_targets_are_met_in_one_linear_step(k, falloff):
    centers, moves, rots = example(k, seed=k, degrees=90.0)
    h = brushes.Handles(centers, RADIUS, moves, rotations=rots, falloff=falloff)
    np.testing.assert_allclose(h.displacement(centers), moves, rtol=0, atol=1e-12)
    np.testing.assert_allclose(h.apply(centers, flow=False), centers + moves, rtol=0, atol=1e-12)
    # skew part of the Jacobian = rotation: half the curl by central differences against scipy's
    # rotation vector of the same turn (Rotation.from_rotvec(..., degrees=True).as_rotvec())
    want = Rotation.from_rotvec(rots, degrees=True).as_rotvec()
    got = spin_by_differences(h.displacement, centers, 1e-5 * RADIUS)
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-6)
    J = h.jacobian(centers)
    skew = 0.5 * (J - J.transpose(0, 2, 1))
    np.testing.assert_allclose(skew[:, [2, 0, 1], [1, 2, 0]], want, rtol=0, atol=1e-12)


def test_without_rotations_the_handles_turn_freely():
    centers, moves, _ = example(4, seed=3)
    free = brushes.Handles(centers, RADIUS, moves)
    held = brushes.Handles(centers, RADIUS, moves, rotations=np.zeros((4, 3)))
    np.testing.assert_allclose(held.displacement(centers), moves, rtol=0, atol=1e-12)
    np.testing.assert_allclose(spin_by_differences(held.displacement, centers, 1e-5 * RADIUS), 0.0, atol=1e-6)
    # without twist loads the spin at the handles is whatever the forces make, not zero
    assert np.abs(spin_by_differences(free.displacement, centers, 1e-5 * RADIUS)).max() > 1e-3


@pytest.mark.parametrize("falloff,poisson", [("wide", 0.5), ("medium", 0.3), ("tight", -0.2)])
@pytest.mark.parametrize("rotations", [False, True])
def test_field_is_the_reference_sum_of_kelvinlets(falloff, poisson, rotations):
    # the field is a sum of regularized Kelvinlets (de Goes & James 2017, eq. 9 and sec. 4) with
    # loads fixed by the targets: that field is unique, so a rebuild from public brushes agrees
    centers, moves, rots = example(5, seed=7, rotations=rotations)
    radii = np.array([0.25, 0.3, 0.35, 0.3, 0.4])
    h = brushes.Handles(centers, radii, moves, rotations=rots, poisson=poisson, falloff=falloff)
    f, q = reference_loads(centers, radii, moves, rots, poisson, falloff)
    x = probes(centers, 8)
    expected = reference_field(x, centers, radii, f, q, poisson, falloff)
    np.testing.assert_allclose(h.displacement(x), expected, rtol=0, atol=1e-11)
    got_f, got_q = h.loads()
    np.testing.assert_allclose(got_f, f, rtol=0, atol=1e-11)
    np.testing.assert_allclose(got_q, q, rtol=0, atol=1e-10)


def test_jacobian_matches_differences():
    centers, moves, rots = example(4, seed=11)
    h = brushes.Handles(centers, [0.2, 0.3, 0.4, 0.3], moves, rotations=rots, falloff="medium")
    x = probes(centers, 12, n=30)
    step = 1e-6
    fd = np.stack([(h.displacement(x + step * e) - h.displacement(x - step * e)) / (2 * step)
                   for e in np.eye(3)], axis=2)
    np.testing.assert_allclose(h.jacobian(x), fd, rtol=0, atol=1e-6)


# --- the flow ----------------------------------------------------------------------------------------


def reference_velocity(h, t, x):
    """The handles' velocity at pseudo-time t rebuilt from public brushes: handles at c + t m,
    loads re-solved for the same targets."""
    c = h.centers + t * h.moves
    f, q = reference_loads(c, h.radii, h.moves, h.rotations, h.poisson, h.falloff)
    return reference_field(x, c, h.radii, f, q, h.poisson, h.falloff)


@pytest.mark.parametrize("rotations", [False, True])
def test_flow_lands_where_dop853_does(rotations):
    centers, moves, rots = example(3, seed=21, rotations=rotations, move_radii=2.0, degrees=90.0)
    h = brushes.Handles(centers, RADIUS, moves, rotations=rots)
    x = probes(centers, 22, n=10)

    def rhs(t, y):
        return reference_velocity(h, t, y.reshape(-1, 3)).ravel()

    sol = solve_ivp(rhs, (0.0, 1.0), x.ravel(), method="DOP853", rtol=1e-9, atol=1e-12)
    ref = sol.y[:, -1].reshape(-1, 3)
    motion = np.linalg.norm(ref - x, axis=1).max()
    # scipy's DOP853 as the independent integrator; the engine's RK4 targets ~1e-4 of the motion
    assert np.abs(h.apply(x) - ref).max() <= 1e-4 * motion


@pytest.mark.parametrize("k", [1, 4, 8])
def test_every_handle_lands_on_its_target(k):
    # the straight path c + t m solves dx/dt = v(x, t) because v(c + t m, t) = m at every t
    centers, moves, rots = example(k, seed=30 + k, move_radii=2.0, degrees=90.0)
    h = brushes.Handles(centers, RADIUS, moves, rotations=rots)
    np.testing.assert_allclose(h.apply(centers), centers + moves, rtol=0, atol=1e-12)


def test_flow_steps_are_fold_free_at_every_stage_time():
    centers, moves, rots = example(6, seed=40, move_radii=2.0, degrees=90.0)
    h = brushes.Handles(centers, RADIUS, moves, rotations=rots)
    stats = brushes.FlowStats()
    h.apply(centers[:1], stats=stats)
    n = stats.steps
    # the RK4 step map is one-to-one when h L <= ln 1.9 (flow.py's step rule), checked here at
    # every time a stage evaluates
    times = [i / n + s / n for i in range(n) for s in (0.0, 0.5, 1.0)]
    assert max(h.velocity_lipschitz_at(t) for t in times) / n <= FOLD_FREE_HL * (1 + 1e-12)
    assert stats.evaluations == 4 * n


@SETTINGS
@given(k=st.integers(1, 8), seed=st.integers(0, 2**16), falloff=st.sampled_from(["wide", "medium", "tight"]))
def test_gradient_bound_holds(k, seed, falloff):
    rng = np.random.default_rng(seed)
    centers, moves, rots = example(k, seed=seed, rotations=bool(seed % 2), move_radii=2.0, degrees=90.0)
    radii = RADIUS * rng.uniform(0.6, 1.4, k)
    h = brushes.Handles(centers, radii, moves, rotations=rots, falloff=falloff)
    x = probes(centers, seed, n=4000, radius=RADIUS)
    for t in (0.0, 0.6):
        J = h.jacobian(x) if t == 0.0 else np.stack(
            [(h.velocity(x + 1e-6 * e, t) - h.velocity(x - 1e-6 * e, t)) / 2e-6 for e in np.eye(3)], axis=2)
        sampled = np.linalg.norm(J, 2, axis=(1, 2)).max()
        assert sampled <= (h.lipschitz() if t == 0.0 else h.velocity_lipschitz_at(t)) * (1 + 1e-6)


def _fd_det(h, x, step, **kw):
    n = len(x)
    shifted = np.concatenate([x + step * e for e in np.eye(3)] + [x - step * e for e in np.eye(3)])
    y = h.apply(shifted, **kw)
    F = np.stack([(y[k * n:(k + 1) * n] - y[(3 + k) * n:(4 + k) * n]) / (2 * step) for k in range(3)], axis=2)
    return np.linalg.det(F)


@pytest.fixture(scope="module")
def ball():
    return trimesh.creation.icosphere(subdivisions=5)  # 10,242 vertices, radius 1


@SETTINGS
@given(k=st.integers(1, 8), seed=st.integers(0, 2**16))
def test_flow_keeps_volume_and_never_folds(ball, k, seed):
    # handles on the surface, moves up to two radii, rotations up to 90 degrees, Poisson's ratio
    # 0.5: every load is divergence-free (de Goes & James 2017, sec. 3), so the flow keeps volume
    centers = spread(k, seed)
    rng = np.random.default_rng(seed)
    moves = unit_rows(rng, k) * rng.uniform(0.0, 2.0 * RADIUS, (k, 1))
    rots = unit_rows(rng, k) * rng.uniform(0.0, 90.0, (k, 1))
    h = brushes.Handles(centers, RADIUS, moves, rotations=rots)
    posed = h.apply(ball.vertices)
    after = trimesh.Trimesh(posed, ball.faces, process=False)
    assert abs(after.volume / ball.volume - 1.0) < 1e-4  # trimesh's volume, within 0.01%
    # no fold: every face still points along trimesh's area-weighted vertex normals at its corners
    vn = after.vertex_normals[after.faces].mean(axis=1)
    assert np.all(np.einsum("ij,ij->i", after.face_normals, vn) > 0)
    # and the flow map's deformation gradient (central differences) stays near det 1 (Liouville)
    det = _fd_det(h, probes(centers, seed, n=12), 1e-5 * RADIUS)
    assert det.min() > 0.0
    np.testing.assert_allclose(det, 1.0, rtol=0, atol=1e-4)


def test_flow_is_frame_indifferent():
    rot, shift = Rotation.from_rotvec([0.3, -0.9, 0.5]), np.array([1.0, -2.0, 0.5])
    centers, moves, rots = example(4, seed=50, move_radii=1.5)
    h = brushes.Handles(centers, RADIUS, moves, rotations=rots)
    moved = brushes.Handles(rot.apply(centers) + shift, RADIUS, rot.apply(moves), rotations=rot.apply(rots))
    x = probes(centers, 51, n=40)
    pins = centers[:1] + [[0.0, 0.0, 0.9]]
    np.testing.assert_allclose(moved.apply(rot.apply(x) + shift, pins=rot.apply(pins) + shift),
                               rot.apply(h.apply(x, pins=pins)) + shift, rtol=0, atol=1e-10)


# --- pins are handles that do not move ----------------------------------------------------------------


@pytest.mark.parametrize("flow", [False, True])
def test_pins_hold_and_handles_still_land(flow):
    centers, moves, rots = example(3, seed=60, move_radii=2.0, degrees=60.0)
    h = brushes.Handles(centers, RADIUS, moves, rotations=rots)
    pins = np.array([[0.0, 0.0, 0.0], [1.6, 0.0, 0.0], [0.0, -1.5, 0.3]])
    x = np.concatenate([centers, pins, probes(centers, 61, n=20)])
    out = h.apply(x, flow=flow, pins=pins)
    np.testing.assert_allclose(out[:3], centers + moves, rtol=0, atol=1e-12)
    np.testing.assert_allclose(out[3:6], pins, rtol=0, atol=1e-12)


def test_a_pin_is_a_handle_with_zero_move():
    centers, moves, _ = example(3, seed=62)
    pin = np.array([[0.0, 1.7, 0.0]])
    x = probes(centers, 63)
    joint = brushes.Handles(np.concatenate([centers, pin]), RADIUS, np.concatenate([moves, np.zeros((1, 3))]))
    pinned = brushes.Handles(centers, RADIUS, moves).apply(x, flow=False, pins=pin)
    np.testing.assert_allclose(pinned, x + joint.displacement(x), rtol=0, atol=1e-13)


@pytest.mark.parametrize("flow", [False, True])
def test_a_pin_on_a_handle_is_refused_naming_the_pair(flow):
    centers, moves, _ = example(3, seed=64)
    moves[0] *= 1.5 * RADIUS / np.linalg.norm(moves[0])  # half way is 0.75 radii from either end
    h = brushes.Handles(centers, RADIUS, moves)
    with pytest.raises(ValueError, match=r"^pins\[1\]: pin 1 is .* from handle 2's centre"):
        h.apply(centers, flow=flow, pins=[[5.0, 5.0, 5.0], centers[2] + [0.01, 0.0, 0.0]])
    halfway = centers[0] + 0.5 * moves[0]
    if flow:
        with pytest.raises(ValueError, match=r"^pins\[0\]: pin 0 is .* from handle 0's centre path"):
            h.apply(centers, pins=halfway)
    else:  # the handle does not travel in one linear step
        np.testing.assert_allclose(h.apply(halfway[None], flow=False, pins=halfway), halfway[None], atol=1e-12)


def test_handles_too_close_are_refused_naming_the_pair():
    c = np.array([[0.0, 0.0, 0.0], [1.0, 0.0, 0.0], [1.0, 0.0, 1e-9]])
    with pytest.raises(ValueError, match=r"^centers\[2\]: handle 1 and handle 2 are 1e-09 apart"):
        brushes.Handles(c, RADIUS, np.zeros((3, 3)) + [0.1, 0.0, 0.0])
    with pytest.raises(ValueError, match=r"^pins\[1\]: pins 0 and 1 are"):
        brushes.Handles(c[:2], RADIUS, [[0.1, 0, 0], [0, 0.1, 0]]).apply(c, pins=[[3.0, 0, 0], [3.0, 0, 0]])


def test_paths_that_meet_are_refused_in_flow_only():
    h = brushes.Handles([[0.0, 0.0, 0.0], [1.0, 0.0, 0.0]], RADIUS, [[1.0, 0.0, 0.0], [-1.0, 0.0, 0.0]])
    with pytest.raises(ValueError, match=r"^moves\[1\]: handles 0 and 1 meet on their way"):
        h.apply(np.zeros((1, 3)))
    np.testing.assert_allclose(h.apply(h.centers, flow=False), h.centers + h.moves, atol=1e-12)


# --- the brush's face: params, mirror, reach, bad input --------------------------------------------


def test_params_rebuild_the_brush():
    centers, moves, rots = example(3, seed=70)
    for h in (brushes.Handles(centers, RADIUS, moves), brushes.Handles(centers, [0.2, 0.3, 0.4], moves, rotations=rots,
                                                                          poisson=0.3, falloff="tight")):
        again = type(h)(**h.params())
        assert again == h
        assert json.loads(json.dumps(h.params())) == h.params()
    assert "rotations" not in brushes.Handles(centers, RADIUS, moves).params()


def test_mirrored_handles_are_symmetric():
    centers, moves, rots = example(2, seed=72)
    m = brushes.mirror(brushes.Handles(centers + [0.5, 0, 0], RADIUS, moves, rotations=rots), (1, 0, 0))
    x = probes(centers, 73, n=30)
    H = np.diag([-1.0, 1.0, 1.0])
    np.testing.assert_allclose(m.apply(x @ H), m.apply(x) @ H, rtol=0, atol=1e-10)


def test_reach_is_a_bound():
    centers, moves, rots = example(3, seed=74)
    h = brushes.Handles(centers, [0.2, 0.3, 0.25], moves, rotations=rots, falloff="medium")
    tol = 1e-3
    r = h.reach(tol)
    rng = np.random.default_rng(75)
    d = unit_rows(rng, 2000) * (r * rng.uniform(1.0, 3.0, (2000, 1)))
    assert np.linalg.norm(h.displacement(h.center + d), axis=1).max() < tol
    assert np.linalg.norm(h.displacement(centers), axis=1).max() > tol


@pytest.mark.parametrize("kwargs,match", [
    ({"centers": []}, r"^centers: must hold at least one handle"),
    ({"centers": "paw"}, r"^centers: must be a list of \[x, y, z\] rows"),
    ({"centers": [[0, 0, 0], [1, 0]]}, r"^centers\[1\]: must be 3 numbers"),
    ({"centers": [[0, 0, np.nan], [1, 0, 0]]}, r"^centers\[0\]: must be finite"),
    ({"centers": [[True, 0, 0], [1, 0, 0]]}, r"^centers\[0\]: must be 3 numbers"),
    ({"moves": [[0, 0, 0]]}, r"^moves: must have 2 rows \(one per handle\), got 1"),
    ({"moves": [[0, 0, 0], [0, 0, np.inf]]}, r"^moves\[1\]: must be finite"),
    ({"rotations": [[0, 0, 0]]}, r"^rotations: must have 2 rows"),
    ({"rotations": [[0, 0, "x"], [0, 0, 0]]}, r"^rotations\[0\]: must be 3 numbers"),
    ({"radius": -0.1}, r"^radius: must be a positive number"),
    ({"radius": [0.1, 0.2, 0.3]}, r"^radius: must be one number, or one per handle \(2\)"),
    ({"radius": [0.1, 0.0]}, r"^radius\[1\]: must be a positive number"),
    ({"poisson": 0.6}, r"^poisson: Poisson's ratio must be in"),
    ({"falloff": "soft"}, r"^falloff: must be one of"),
])
def test_bad_arguments_name_the_field(kwargs, match):
    args = {"centers": [[0, 0, 0], [1, 0, 0]], "radius": RADIUS, "moves": [[0.1, 0, 0], [0, 0, 0]],
            **kwargs}
    with pytest.raises(FieldError, match=match):
        brushes.Handles(**args)


# --- the fused kernel: numba against numpy --------------------------------------------------------------


@pytest.mark.parametrize("falloff", ["wide", "medium", "tight"])
def test_fused_kernel_numba_matches_numpy(falloff):
    rng = np.random.default_rng(80)
    k, x = 6, rng.normal(size=(3000, 3))
    c, f, q = rng.normal(size=(k, 3)), rng.normal(size=(k, 3)), rng.normal(size=(k, 3))
    q[2] = 0.0  # a handle with no twist load takes the force-only branch
    eps = np.array([kernels.scales(falloff, r)[0] for r in rng.uniform(0.2, 0.5, k)])
    w = kernels.scales(falloff, 1.0)[1]
    fast = kernels.handles_displacement(x, c, f, q, eps, w, 0.3)
    slow = gen.np_handles_displacement(x, c, f, q, eps, w, 0.3, np.empty_like(x))
    np.testing.assert_allclose(fast, slow, rtol=0, atol=1e-12 * np.abs(slow).max())
    # and both are the per-handle grab and twist kernels summed (one at a time, the engine's others)
    each = sum(kernels.grab_displacement(x, c[j], f[j], eps[j], w, 0.3)
               + kernels.affine_displacement(x, c[j], brushes.brush.skew(q[j]), eps[j], w, 0.3) for j in range(k))
    np.testing.assert_allclose(fast, each, rtol=0, atol=1e-12 * np.abs(slow).max())
    np.testing.assert_allclose(kernels.handles_displacement(x.astype(np.float32), c, f, q, eps, w, 0.3),
                               slow, rtol=0, atol=1e-6 * np.abs(slow).max())


def test_small_lu_matches_lapack():
    # the handles' single-threaded elimination against scipy's LAPACK getrf, same output layout
    import scipy.linalg

    from brushes.handles import lu_factor

    rng = np.random.default_rng(81)
    for n in (1, 3, 24, 150):
        M = rng.normal(size=(n, n))
        lu, piv = lu_factor(M)
        ref_lu, ref_piv = scipy.linalg.lu_factor(M)
        np.testing.assert_array_equal(piv, ref_piv)
        np.testing.assert_allclose(lu, ref_lu, rtol=0, atol=1e-10)
        b = rng.normal(size=n)
        np.testing.assert_allclose(M @ scipy.linalg.lu_solve((lu, piv), b), b, rtol=0, atol=1e-9)


# --- recipes and the command -----------------------------------------------------------------------------


STROKE = {"brush": "handles", "centers": [[0.0, 0.8, 0.0], [0.8, 0.0, 0.0], [0.0, -0.9, 0.0]], "radius": 0.4,
          "moves": [[0.2, 0.3, 0.0], [0.0, 0.0, 0.0], [0.0, 0.0, 0.0]],
          "rotations": [[0.0, 0.0, 40.0], [0.0, 0.0, 0.0], [0.0, 0.0, 0.0]], "pins": [[-0.9, 0.0, 0.0]]}


def pliant(*args):
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    return subprocess.run([sys.executable, "-m", "brushes.cli", *map(str, args)], capture_output=True,
                          text=True, timeout=600, env=env)


@pytest.fixture(scope="module")
def sphere_files(tmp_path_factory):
    d = tmp_path_factory.mktemp("handles")
    sphere = trimesh.creation.icosphere(subdivisions=3)
    mesh = d / "ball.obj"
    mesh.write_text(trimesh.exchange.obj.export_obj(sphere, include_normals=False, include_texture=False))
    rest = np.asarray(trimesh.load(mesh, process=False, maintain_order=True, force="mesh").vertices)
    return d, mesh, rest


def recipe_file(folder, stroke, name="pose.json"):
    path = folder / name
    path.write_text(json.dumps({"format": "pliant-recipe", "version": 1, "strokes": [stroke]}))
    return path


def test_a_handles_stroke_replays_through_apply_and_batch_as_the_api(sphere_files, tmp_path):
    d, mesh, rest = sphere_files
    s = STROKE
    api = brushes.Handles(s["centers"], s["radius"], s["moves"], rotations=s["rotations"]).apply(rest, pins=s["pins"])
    recipe = recipe_file(tmp_path, s)
    proc = pliant("apply", recipe, mesh, "-o", tmp_path / "posed.obj")
    assert proc.returncode == 0, proc.stderr
    got = trimesh.load(tmp_path / "posed.obj", process=False, maintain_order=True, force="mesh").vertices
    np.testing.assert_allclose(got, api, rtol=0, atol=1e-9)  # OBJ text keeps ~1e-10
    proc = pliant("batch", recipe, mesh, "--out", tmp_path / "out", "--jobs", "1", "--quiet")
    assert proc.returncode == 0, proc.stderr
    got = trimesh.load(tmp_path / "out" / "ball.obj", process=False, maintain_order=True, force="mesh").vertices
    np.testing.assert_allclose(got, api, rtol=0, atol=1e-9)


@pytest.mark.parametrize("change,field", [
    ({"centers": [[0, 0, 0], [1, 0]]}, "strokes[0].centers[1]"),
    ({"moves": [[0.1, 0, 0]]}, "strokes[0].moves"),
    ({"rotations": [[0, 0, 1]] * 2}, "strokes[0].rotations"),
    ({"radius": [0.4, -1, 0.4]}, "strokes[0].radius[1]"),
    ({"radius": "wide"}, "strokes[0].radius"),
    ({"poisson": 2}, "strokes[0].poisson"),
    ({"falloff": 3}, "strokes[0].falloff"),
    ({"centers": [[0, 0.8, 0], [0, 0.8, 0], [0, -0.9, 0]]}, "strokes[0].centers[1]"),
    ({"pins": [[0.8, 0.0, 0.01]]}, "strokes[0].pins[0]"),
    ({"moves": [[0.8, -0.8, 0], [0, 0, 0], [0, 0, 0]], "rotations": None}, "strokes[0].moves[1]"),
    ({"strength": 2}, "strokes[0].strength"),
])
def test_bad_handles_strokes_exit_2_naming_the_field_and_write_nothing(sphere_files, tmp_path, change, field):
    _, mesh, _ = sphere_files
    recipe = recipe_file(tmp_path, {**STROKE, **change})
    out = tmp_path / "posed.obj"
    proc = pliant("apply", recipe, mesh, "-o", out)
    assert proc.returncode == 2, (proc.stdout, proc.stderr)
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in proc.stderr
    assert f"{field}:" in lines[0], lines[0]
    assert not out.exists() and not [p for p in tmp_path.iterdir() if p.name.endswith(".tmp")]
