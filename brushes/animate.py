"""The animate job: a recipe played as motion with its secondary motion, stored as a glTF 2.0
animation of a few morph targets.

Timing. The strokes share `seconds` evenly: stroke k owns the slot [k D, (k + 1) D), D = S / N.
Over the first half of its slot the stroke's load rises linearly and its pose follows as a flow:
at progress p = min(tau / (D / 2), 1) the mesh is the stroke's flow to pseudo-time p (integrated
once per stroke, in chunks between the frames' progress values). Its secondary motion is added:
the elastodynamic response to that ramped load (`brushes.dynamic`, ramp D / 2) minus the
quasi-static response p U to it, both at the stroke's starting positions and masked like the
stroke,

    frame(t) = flow_k(X_k-1; p) + mask * [dynamic_k(X_k-1, tau) - p U_k(X_k-1)],  tau = t - k D,

faded by the damping window of length D so that it ends with the slot. Each slot ends on the
stroke's flowed pose, which is the recipe's pose after that stroke to the flow's accuracy (the
chunks are integrated with their own fold-free steps). The secondary motion is linear
elastodynamics added to a nonlinear flow: a visual device for animation, not a simulation.

Storage. The frames' offsets from the rest mesh, an (m, 3n) matrix, are cut to the fewest
singular vectors (a truncated SVD) whose reconstruction, as a glTF viewer computes it from the
stored float32 numbers, is within `tolerance` of every exact frame at every vertex. Each singular
vector is one morph target; an animation channel on the morph weights plays them (linear
interpolation between frames). The exact frames can also be kept as an .npz.

Memory: the frames are held in float64, 24 bytes per vertex per frame, and the compression
works on copies of them: up to `PEAK_BYTES` per vertex per frame at its peak.
"""
from __future__ import annotations

import io
import math
import os
from dataclasses import dataclass

import numpy as np

from brushes import checks
from brushes.atomic import atomic_write
from brushes.formats import gltf as gltf_format

#: Vertex-frames (frames x vertices) from which the command shows a progress bar.
LONG_ANIMATION = 1_000_000
#: Peak memory of a job per vertex per frame (bytes): the frames, their offsets, the residual
#: of the truncated SVD and a rebuilt copy, float64 each, and a temporary.
PEAK_BYTES = 120
#: Share of a stroke's slot over which its load rises and its pose flows (the rest is settling).
RAMP_SHARE = 0.5
FRAMES_FORMAT = "pliant-frames"
FRAMES_VERSION = 1
_ANIMATED_KINDS = ("grab", "twist", "scale", "pinch", "handles")


def chunk_params(kind, params, a, b):
    """The parameters of the stroke's flow from pseudo-time a to b (0 <= a <= b <= 1) as a
    stroke of its own, flowed over [0, 1].

    Grab: its centre is carried along, so the chunk is a grab from center + a move by (b - a)
    move; handles likewise (their loads are solved linearly in the moves and rotations, so the
    chunk's targets are (b - a) times theirs). Twist, scale and pinch have velocity fields
    constant in pseudo-time, so the chunk is the brush with strength times (b - a) (scale:
    factor to the power b - a). Pins are solved for each velocity, so they carry over unchanged.
    """
    out = dict(params)
    d = b - a
    if kind == "grab":
        move = np.asarray(params["move"], dtype=np.float64)
        out["center"] = (np.asarray(params["center"], dtype=np.float64) + a * move).tolist()
        out["move"] = (d * move).tolist()
    elif kind == "twist":
        out["degrees"] = d * float(params["degrees"])
    elif kind == "scale":
        out["factor"] = float(params["factor"]) ** d
    elif kind == "pinch":
        out["gradient"] = [[d * float(v) for v in row] for row in params["gradient"]]
    elif kind == "handles":   # handles at c + t move with the same targets: solved linearly in them
        moves = np.asarray(params["moves"], dtype=np.float64)
        out["centers"] = (np.asarray(params["centers"], dtype=np.float64) + a * moves).tolist()
        out["moves"] = (d * moves).tolist()
        if params.get("rotations") is not None:
            out["rotations"] = (d * np.asarray(params["rotations"], dtype=np.float64)).tolist()
    else:
        raise checks.FieldError("brush", f"{kind!r} strokes cannot be animated; the secondary motion is "
                                "derived for " + ", ".join(_ANIMATED_KINDS))
    return out


def check_recipe(recipe):
    """Refuse, naming the stroke, recipes that cannot be animated (an empty recipe or strokes of
    brush kinds without a derived dynamic response)."""
    if not len(recipe):
        raise checks.FieldError("strokes", "the recipe has no strokes; there is nothing to animate")
    for i, stroke in enumerate(recipe.strokes):
        if stroke.kind not in _ANIMATED_KINDS:
            raise checks.FieldError(f"strokes[{i}].brush", f"{stroke.kind!r} strokes cannot be animated; the "
                                    "secondary motion is derived for " + ", ".join(_ANIMATED_KINDS))


def frame_times(seconds, fps):
    """(m,) float64: m = round(seconds * fps) + 1 evenly spaced times from 0 to `seconds`."""
    seconds = checks.positive("seconds", seconds)
    fps = checks.positive("fps", fps)
    count = max(2, int(round(seconds * fps)) + 1)
    return np.linspace(0.0, seconds, count)


class _StrokeMotion:
    """One stroke's motion from `start` (n, 3): its flowed pose and its secondary motion.

    The flow is integrated once, in chunks between the progress values of the frames (each
    chunk a stroke of its own, see `chunk_params`), so the frames of a slot cost about one flow;
    a mask blends each pose with the start, as `Brush.apply` does.
    """

    def __init__(self, stroke, start, *, groups, where, shear_speed, slot):
        from brushes.dynamic import dynamic
        from brushes.recipe import Stroke

        self.stroke, self.start, self.groups, self.where = stroke, start, groups, where
        self.ramp = RAMP_SHARE * slot
        self._Stroke = Stroke
        pins = None if stroke.pins is None else np.asarray(stroke.pins, dtype=np.float64)
        try:
            self.response = dynamic(stroke.brush(), shear_speed=shear_speed, ramp=self.ramp, damping=slot,
                                    pins=pins)
        except checks.FieldError as exc:
            raise exc.within(where) from None
        self.settled = self.response.limit(start)                       # U, the static response
        self.mask = stroke.weights(len(start), groups=groups, where=where)
        self._p, self._flowed = 0.0, start
        self._end = None

    def progress(self, tau):
        return min(max(tau / self.ramp, 0.0), 1.0)

    def _flow_to(self, p):
        """The unmasked flow from the start to progress p >= the last one reached."""
        if p > self._p:
            s = self.stroke
            if s.flow:
                chunk = self._Stroke(s.kind, chunk_params(s.kind, s.params, self._p, p), flow=True, pins=s.pins,
                                     mirror=s.mirror)
                self._flowed = chunk.apply(self._flowed, where=self.where)
            else:   # one linear step is linear in the strength
                whole = self._Stroke(s.kind, s.params, flow=False, pins=s.pins, mirror=s.mirror)
                self._flowed = self.start + p * (whole.apply(self.start, where=self.where) - self.start)
            self._p = p
        return self._flowed

    def _blend(self, flowed):
        if self.mask is None:
            return flowed.copy()
        return self.start + self.mask[:, None] * (flowed - self.start)

    @property
    def end(self):
        """The pose (n, 3) after the stroke: the flow to progress 1."""
        if self._end is None:
            self._end = self._blend(self._flow_to(1.0))
        return self._end

    def pose(self, tau):
        """The flowed pose (n, 3) at time tau into the slot."""
        p = self.progress(tau)
        if p <= 0.0:
            return self.start.copy()
        if p >= 1.0:
            return self.end.copy()
        return self._blend(self._flow_to(p))

    def secondary(self, tau, out):
        """out = mask * (dynamic(tau) - p U): the secondary motion (n, 3) at tau into the slot."""
        self.response.displacement(self.start, tau, out=out)
        out -= self.progress(tau) * self.settled
        if self.mask is not None:
            out *= self.mask[:, None]
        return out


def frames(recipe, points, *, groups=None, seconds, fps, shear_speed, progress=None):
    """Exact frames of a recipe played over `seconds` with its secondary motion (module docstring).

    recipe : brushes.Recipe; points : (n, 3) float rest positions; groups : the mesh's named
    vertex groups for masks. seconds, fps : float; shear_speed : model units per second.
    progress : callable(frame_index) or None, called after each frame.
    Returns (times (m,) float64, frames (m, n, 3) float64).
    """
    check_recipe(recipe)
    pts = checks.points("points", points)
    times = frame_times(seconds, fps)
    shear_speed = checks.positive("shear_speed", shear_speed)
    slot = times[-1] / len(recipe)
    out = np.empty((len(times), len(pts), 3))
    buf = np.empty_like(pts)
    motion, start, k_now = None, pts, -1
    for j, t in enumerate(times):
        k = min(int(t / slot), len(recipe) - 1)
        tau = t - k * slot
        if tau >= slot * (1.0 - 1e-9) or j == len(times) - 1:
            tau = slot                                                  # the slot's end: settled
        while k_now < k:
            if motion is not None:
                start = motion.end
            k_now += 1
            motion = _StrokeMotion(recipe.strokes[k_now], start, groups=groups, where=f"strokes[{k_now}]",
                                   shear_speed=shear_speed, slot=slot)
        out[j] = motion.pose(tau)
        if tau < slot:
            out[j] += motion.secondary(tau, buf)
        if progress is not None:
            progress(j)
    return times, out


# --------------------------------------------------------------------------- compression

@dataclass
class Compressed:
    """Frames as morph targets: frame j = rest + sum_i weights[j, i] targets[i].

    targets : (k, n, 3) float32; weights : (m, k) float32 in [-1, 1]; rank : k;
    worst_error : the largest distance (model units) between a vertex of a rebuilt frame (in
    float32, as stored) and the exact frame; singular_values : (k,) float64.
    """

    targets: np.ndarray
    weights: np.ndarray
    rank: int
    worst_error: float
    singular_values: np.ndarray


def _worst(residual, n):
    r = residual.reshape(len(residual), n, 3)
    return float(np.sqrt(np.einsum("mvi,mvi->mv", r, r).max())) if r.size else 0.0


def compress(rest, frames_, *, tolerance):
    """The fewest morph targets that rebuild every frame within `tolerance` (model units).

    rest : (n, 3) float; frames_ : (m, n, 3) float. Truncated SVD of the offsets; the error is
    measured on the float32 numbers a glTF file stores (positions, targets and weights).
    Raises FieldError("tolerance") when even every singular vector cannot meet it in float32.
    """
    tolerance = checks.positive("tolerance", tolerance)
    rest = checks.points("rest", rest)
    F = np.asarray(frames_, dtype=np.float64)
    m, n = len(F), len(rest)
    M = (F - rest[None]).reshape(m, 3 * n)
    U, S, Vt = _svd(M)
    full = len(S)
    rest32 = rest.astype(np.float32).astype(np.float64)
    base = (rest32 - rest).reshape(1, 3 * n)               # the rest as float32 stores it
    top = max(full, 1)
    if full == 0:   # nothing moves: one zero target keeps the file's animation well formed
        U, S, Vt = np.zeros((m, 1)), np.zeros(1), np.zeros((1, 3 * n))
    residual = M.copy()
    for k in range(1, top + 1):
        if k <= full:
            residual -= np.outer(U[:, k - 1] * S[k - 1], Vt[k - 1])
        if _worst(residual, n) > tolerance and k < top:
            continue
        targets, weights = _quantized(U, S, Vt, k, n)
        rebuilt = base + weights.astype(np.float64) @ targets.reshape(k, -1).astype(np.float64)
        worst = _worst(rebuilt - M, n)
        if worst <= tolerance:
            return Compressed(targets, weights, k, worst, S[:k].copy())
    raise checks.FieldError("tolerance", f"{tolerance:.3g} is finer than the glTF file's float32 numbers can "
                            f"hold for this mesh (best {worst:.3g} with all {top} morph targets)")


def _svd(M):
    """Thin SVD of M (m, N) with m << N through the Gram matrix M M^T (m, m): U, S, V^T with the
    singular values below 1e-7 of the largest dropped (float32 cannot store them anyway; every
    kept direction is checked by the rebuilt frames' measured error)."""
    lam, U = np.linalg.eigh(M @ M.T)
    order = np.argsort(lam)[::-1]
    lam, U = np.clip(lam[order], 0.0, None), U[:, order]
    S = np.sqrt(lam)
    keep = S > (S[0] * 1e-7 if len(S) and S[0] > 0 else np.inf)
    U, S = U[:, keep], S[keep]
    Vt = (U.T @ M) / S[:, None]
    return U, S, Vt


def _quantized(U, S, Vt, k, n):
    """Targets (k, n, 3) float32 scaled so the weights (m, k) float32 lie in [-1, 1]."""
    scale = np.abs(U[:, :k]).max(axis=0)
    scale[scale == 0] = 1.0
    weights = (U[:, :k] / scale).astype(np.float32)
    targets = ((S[:k] * scale)[:, None] * Vt[:k]).reshape(k, n, 3).astype(np.float32)
    return targets, weights


# --------------------------------------------------------------------------- files

_ARRAY_BUFFER = 34962
_ELEMENT_ARRAY_BUFFER = 34963
_FLOAT = 5126
_UINT16 = 5123
_UINT32 = 5125


def gltf_bytes(rest, faces, uv, times, compressed, *, glb=True, name="animation"):
    """A glTF 2.0 asset (bytes): the rest mesh, one morph target per kept singular vector, and an
    animation of the morph weights at `times` (linear interpolation).

    rest : (n, 3) float; faces : (f, 3) int; uv : (n, 2) float or None (bottom-left origin,
    flipped to glTF's top-left); times : (m,) float seconds; compressed : `Compressed`.
    Written here rather than through `brushes.correctives`, which stores one morph target and no
    animation.
    """
    buf = gltf_format.BufferBuilder()
    add = buf.add

    rest = np.asarray(rest, dtype=np.float64)
    attributes = {"POSITION": add(rest.astype(np.float32), "VEC3", _FLOAT, target=_ARRAY_BUFFER, bounds=True)}
    if uv is not None:
        uv = np.asarray(uv, dtype=np.float64)
        uv = np.stack([uv[:, 0], 1.0 - uv[:, 1]], axis=1).astype(np.float32)
        attributes["TEXCOORD_0"] = add(uv, "VEC2", _FLOAT, target=_ARRAY_BUFFER)
    targets = [{"POSITION": add(t, "VEC3", _FLOAT, target=_ARRAY_BUFFER, bounds=True)}
               for t in compressed.targets]
    primitive = {"attributes": attributes, "targets": targets}
    faces = np.asarray(faces, dtype=np.int64).reshape(-1, 3)
    if len(faces):
        small = len(rest) <= 65535
        idx = faces.astype(np.uint16 if small else np.uint32).ravel()
        primitive["indices"] = add(idx, "SCALAR", _UINT16 if small else _UINT32, target=_ELEMENT_ARRAY_BUFFER)
        primitive["mode"] = 4
    else:
        primitive["mode"] = 0
    time_acc = add(np.asarray(times, dtype=np.float32), "SCALAR", _FLOAT, bounds=True)
    weight_acc = add(np.ascontiguousarray(compressed.weights, dtype=np.float32).ravel(), "SCALAR", _FLOAT)
    k = len(targets)
    binary = buf.binary()
    gltf = {
        "asset": {"version": "2.0", "generator": "pliant animate"},
        "scene": 0,
        "scenes": [{"nodes": [0]}],
        "nodes": [{"name": name, "mesh": 0}],
        "meshes": [{"name": name, "primitives": [primitive], "weights": [0.0] * k,
                    "extras": {"targetNames": [f"motion {i}" for i in range(k)]}}],
        "animations": [{"name": name, "samplers": [{"input": time_acc, "output": weight_acc,
                                                    "interpolation": "LINEAR"}],
                        "channels": [{"sampler": 0, "target": {"node": 0, "path": "weights"}}]}],
        "accessors": buf.accessors,
        "bufferViews": buf.views,
        "buffers": [{"byteLength": len(binary)}],
    }
    return gltf_format.container(gltf, binary, glb=glb)


def write_animation(path, rest, faces, uv, times, compressed):
    """Write the glTF (.glb or .gltf by the extension) atomically."""
    ext = os.path.splitext(os.fspath(path))[1].lower()
    if ext not in (".glb", ".gltf"):
        raise checks.FieldError("path", f"extension must be .glb or .gltf, got {ext or 'none'!r}")
    data = gltf_bytes(rest, faces, uv, times, compressed, glb=ext == ".glb")
    with atomic_write(path) as fh:
        fh.write(data)


def write_frames(path, rest, times, frames_, *, shear_speed):
    """The exact frames as an .npz (our own layout), written atomically.

    keys: format "pliant-frames", version 1, times (m,) float64 seconds, frames (m, n, 3) float64
    positions, shear_speed float64, checksum (hex SHA-256 of the rest positions, as in
    `brushes.correctives.rest_checksum`).
    """
    from brushes.correctives import rest_checksum

    if os.path.splitext(os.fspath(path))[1].lower() != ".npz":
        raise checks.FieldError("path", "the frames file must end in .npz")
    buf = io.BytesIO()
    np.savez(buf, format=np.array(FRAMES_FORMAT), version=np.array(FRAMES_VERSION, np.int64),
             times=np.asarray(times, dtype=np.float64), frames=np.asarray(frames_, dtype=np.float64),
             shear_speed=np.array(float(shear_speed)), checksum=np.array(rest_checksum(rest)))
    with atomic_write(path) as fh:
        fh.write(buf.getvalue())


def default_shear_speed(points):
    """Two bounding-box diagonals per second (model units per second): a shear wave crosses the
    model in half a second, slow enough to see and fast enough to settle within a stroke."""
    pts = checks.points("points", points)
    diag = float(np.linalg.norm(pts.max(axis=0) - pts.min(axis=0))) if len(pts) else 0.0
    if not (diag > 0 and math.isfinite(diag)):
        raise checks.FieldError("MESH", "has no extent, so no default shear speed; give --shear-speed")
    return 2.0 * diag


@dataclass
class Summary:
    """What `animate` made: frame count, seconds, shear speed, rank and worst vertex error."""

    frames: int
    seconds: float
    shear_speed: float
    rank: int
    worst_error: float
    largest_motion: float


def animate(recipe, doc, out, *, seconds=2.0, fps=30.0, shear_speed=None, tolerance=None, frames_path=None,
            progress=None):
    """The whole job: exact frames, compression, the glTF at `out` and (optionally) the .npz.

    doc : a `brushes.formats.MeshDoc` (vertices, faces, uv, groups). tolerance : model units,
    default 1e-3 of the rest bounding-box diagonal. shear_speed : default `default_shear_speed`.
    progress : callable(frame_index) or None. Returns a `Summary`.
    """
    rest = checks.points("MESH", doc.vertices)
    check_recipe(recipe)
    speed = default_shear_speed(rest) if shear_speed is None else checks.positive("shear_speed", shear_speed)
    if tolerance is None:
        tolerance = 1e-3 * float(np.linalg.norm(rest.max(axis=0) - rest.min(axis=0)))
    tolerance = checks.positive("tolerance", tolerance)
    times, exact = frames(recipe, rest, groups=getattr(doc, "groups", None), seconds=seconds, fps=fps,
                          shear_speed=speed, progress=progress)
    comp = compress(rest, exact, tolerance=tolerance)
    write_animation(out, rest, doc.faces, doc.uv, times, comp)
    if frames_path is not None:
        write_frames(frames_path, rest, times, exact, shear_speed=speed)
    moved = exact - rest[None]
    largest = float(np.sqrt(np.einsum("mvi,mvi->mv", moved, moved).max())) if moved.size else 0.0
    return Summary(len(times), float(times[-1]), speed, comp.rank, comp.worst_error, largest)
