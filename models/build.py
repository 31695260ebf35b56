"""Build the demo model: Tock, the wind-up fox of our toy workshop.

Run ``python models/build.py`` to regenerate ``models/mascot.obj`` byte for byte; the joint
positions used by ``models/mascot-pose.json`` are printed as JSON.

How the figure is made:

1. The figure is a signed distance field (negative inside): ellipsoids and round cones (a capsule
   whose radius changes linearly along its axis) joined by a polynomial smooth minimum, so limbs
   blend into the body without creases.
2. The field is sampled on a regular grid and polygonised by marching tetrahedra on the
   Freudenthal (Kuhn) split of each cube into six tetrahedra. The split is the same in every cube,
   so neighbouring cubes agree on shared faces and the level set is a closed, consistently wound
   2-manifold whenever the field is positive on the grid boundary.
3. Each face goes to the body part whose own distance is smallest at its centroid; faces are
   written part by part under OBJ ``g`` groups.
4. UVs come from a projection, one ``vt`` per ``v`` with the same index (no seams): u is the
   mirrored angle about the vertical axis, ``|atan2(x, z)| / pi`` (0 at the front, 1 at the back,
   the same on the left and right side, like a mirrored texture), v is the height over the
   figure's height.

Only +, -, *, / and sqrt enter the geometry, which IEEE 754 rounds exactly, so the bytes do not
depend on the CPU's vector units; the only transcendental (atan2, for u) is rounded to 6 decimals.
There is no randomness, hence no seed.

Conventions: metres-free units, about 2 tall, +Y up, the figure faces +Z, its left side is +X.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile

import numpy as np

# ---------------------------------------------------------------------------------------------
# Design: every point below is part of the figure's design, in model units.

#: Joints and landmarks, named from the figure's point of view (left = +X).
JOINTS = {
    "neck": (0.0, 1.40, 0.0),
    "head": (0.0, 1.62, 0.02),
    "snout_tip": (0.0, 1.55, 0.39),
    "ear_left_tip": (0.20, 2.00, -0.02),
    "ear_right_tip": (-0.20, 2.00, -0.02),
    "shoulder_left": (0.27, 1.24, 0.0),
    "elbow_left": (0.43, 1.00, 0.03),
    "hand_left": (0.50, 0.78, 0.07),
    "shoulder_right": (-0.27, 1.24, 0.0),
    "elbow_right": (-0.43, 1.00, 0.03),
    "hand_right": (-0.50, 0.78, 0.07),
    "hip_left": (0.15, 0.70, 0.0),
    "knee_left": (0.17, 0.40, 0.03),
    "ankle_left": (0.17, 0.12, 0.0),
    "hip_right": (-0.15, 0.70, 0.0),
    "knee_right": (-0.17, 0.40, 0.03),
    "ankle_right": (-0.17, 0.12, 0.0),
    "tail_0": (0.0, 0.74, -0.22),
    "tail_1": (0.0, 0.70, -0.42),
    "tail_2": (0.0, 0.76, -0.62),
    "tail_3": (0.0, 0.90, -0.78),
    "tail_tip": (0.0, 1.08, -0.86),
    "key_root": (0.0, 1.17, -0.22),
    "key_bow": (0.0, 1.17, -0.44),
}

#: Tail radii at tail_0 .. tail_tip (a bushy tail, thickest in the middle).
TAIL_RADII = (0.09, 0.14, 0.17, 0.14, 0.05)

#: Order of the OBJ groups in the file.
PARTS = ("body", "head", "arm_left", "arm_right", "leg_left", "leg_right", "tail", "key")

GRID_STEP = 0.018  # grid spacing of the polygonisation
BLEND = 0.06  # smooth-minimum width where limbs meet the body
SMALL_BLEND = 0.02  # for the ears and the key
T_CLAMP = 0.02  # keeps each surface vertex off the grid points: no degenerate triangles


def _p(name):
    return np.array(JOINTS[name], dtype=np.float64)


# ---------------------------------------------------------------------------------------------
# Distance primitives. points : (n, 3) float64 -> (n,) float64, negative inside.


def ellipsoid(points, center, radii):
    """Approximate distance to an ellipsoid: k0 (k0 - 1) / k1 with k0 = |p/r|, k1 = |p/r^2|.

    Exact on the surface (zero set) and of the right sign everywhere; a common practice bound
    for implicit modelling.
    """
    q = points - np.asarray(center, dtype=np.float64)
    r = np.asarray(radii, dtype=np.float64)
    k0 = np.sqrt(np.sum((q / r) ** 2, axis=1))
    k1 = np.sqrt(np.sum((q / (r * r)) ** 2, axis=1))
    return k0 * (k0 - 1.0) / np.maximum(k1, 1e-12)


def round_cone(points, a, b, ra, rb):
    """Exact distance to the convex hull of the spheres (a, ra) and (b, rb).

    The closest point lies on a sphere cap or on the cone tangent to both spheres; which one is
    decided by comparing the axial coordinate with the tangent cone's slope (common practice
    closed form, written from memory and checked against sampling in tests/test_models.py).
    """
    a = np.asarray(a, dtype=np.float64)
    b = np.asarray(b, dtype=np.float64)
    ba = b - a
    l2 = float(ba @ ba)
    rr = ra - rb
    a2 = l2 - rr * rr
    il2 = 1.0 / l2
    pa = points - a
    y = pa @ ba
    z = y - l2
    w = pa * l2 - y[:, None] * ba
    x2 = np.sum(w * w, axis=1)
    y2 = y * y * l2
    z2 = z * z * l2
    k = np.sign(rr) * rr * rr * x2
    cap_b = np.sign(z) * a2 * z2 > k
    cap_a = np.sign(y) * a2 * y2 < k
    side = (np.sqrt(x2 * a2 * il2) + y * rr) * il2 - ra
    out = np.where(cap_a, np.sqrt(x2 + y2) * il2 - ra, side)
    return np.where(cap_b, np.sqrt(x2 + z2) * il2 - rb, out)


def smooth_min(d1, d2, k):
    """Polynomial smooth minimum of width k (common practice): min(d1, d2) - k h^2 / 4."""
    h = np.maximum(k - np.abs(d1 - d2), 0.0) / k
    return np.minimum(d1, d2) - h * h * k * 0.25


# ---------------------------------------------------------------------------------------------
# The figure, part by part.


def _part_fields(points):
    """Distance of each part. points : (n, 3) float64 -> dict name -> (n,) float64."""
    f = {}
    # Body: a pear of two ellipsoids, belly forward.
    body = ellipsoid(points, (0.0, 0.98, 0.0), (0.30, 0.38, 0.25))
    belly = ellipsoid(points, (0.0, 0.90, 0.04), (0.27, 0.26, 0.24))
    f["body"] = smooth_min(body, belly, BLEND)

    # Head: a round skull, cheeks, a snout and two pointed ears.
    skull = ellipsoid(points, _p("head"), (0.27, 0.24, 0.24))
    cheeks = ellipsoid(points, (0.0, 1.55, 0.06), (0.26, 0.14, 0.20))
    snout = round_cone(points, (0.0, 1.58, 0.12), _p("snout_tip"), 0.125, 0.04)
    nose = ellipsoid(points, _p("snout_tip") + (0.0, 0.005, 0.0), (0.045, 0.035, 0.035))
    head = smooth_min(smooth_min(skull, cheeks, BLEND), snout, BLEND)
    head = smooth_min(head, nose, SMALL_BLEND)
    for side in ("left", "right"):
        s = 1.0 if side == "left" else -1.0
        ear = round_cone(points, (0.13 * s, 1.78, -0.01), _p(f"ear_{side}_tip"), 0.085, 0.02)
        head = smooth_min(head, ear, SMALL_BLEND)
    neck = round_cone(points, (0.0, 1.22, 0.0), _p("neck"), 0.13, 0.11)
    f["head"] = smooth_min(head, neck, BLEND)

    # Arms: upper arm and forearm, mitten hands.
    for side in ("left", "right"):
        upper = round_cone(points, _p(f"shoulder_{side}"), _p(f"elbow_{side}"), 0.095, 0.075)
        lower = round_cone(points, _p(f"elbow_{side}"), _p(f"hand_{side}"), 0.075, 0.065)
        s = 1.0 if side == "left" else -1.0
        hand = ellipsoid(points, _p(f"hand_{side}") + (0.01 * s, -0.04, 0.01), (0.075, 0.09, 0.07))
        f[f"arm_{side}"] = smooth_min(smooth_min(upper, lower, 0.05), hand, 0.04)

    # Legs: thigh, shin and a long foot pointing forward.
    for side in ("left", "right"):
        thigh = round_cone(points, _p(f"hip_{side}"), _p(f"knee_{side}"), 0.12, 0.09)
        shin = round_cone(points, _p(f"knee_{side}"), _p(f"ankle_{side}"), 0.09, 0.075)
        foot = ellipsoid(points, _p(f"ankle_{side}") + (0.0, -0.05, 0.08), (0.10, 0.07, 0.16))
        f[f"leg_{side}"] = smooth_min(smooth_min(thigh, shin, 0.06), foot, 0.04)

    # Tail: a chain of round cones through the tail joints.
    names = ("tail_0", "tail_1", "tail_2", "tail_3", "tail_tip")
    tail = None
    for i in range(len(names) - 1):
        seg = round_cone(points, _p(names[i]), _p(names[i + 1]), TAIL_RADII[i], TAIL_RADII[i + 1])
        tail = seg if tail is None else smooth_min(tail, seg, 0.03)
    f["tail"] = tail

    # Wind-up key: a shaft out of the back and a two-lobed flat bow.
    shaft = round_cone(points, _p("key_root"), _p("key_bow"), 0.035, 0.035)
    bow = _p("key_bow") + (0.0, 0.0, -0.04)
    lobe_up = ellipsoid(points, bow + (0.0, 0.085, 0.0), (0.035, 0.09, 0.065))
    lobe_down = ellipsoid(points, bow + (0.0, -0.085, 0.0), (0.035, 0.09, 0.065))
    f["key"] = smooth_min(shaft, np.minimum(lobe_up, lobe_down), SMALL_BLEND)
    return f


def figure_field(points):
    """Signed distance of the whole figure. points : (n, 3) float64 -> (n,) float64."""
    f = _part_fields(points)
    d = f["body"]
    for name in ("head", "arm_left", "arm_right", "leg_left", "leg_right", "tail"):
        d = smooth_min(d, f[name], BLEND)
    return smooth_min(d, f["key"], SMALL_BLEND)


def part_of(points):
    """Index into PARTS of the part nearest each point. points : (n, 3) -> (n,) int64."""
    f = _part_fields(points)
    return np.argmin(np.stack([f[name] for name in PARTS], axis=1), axis=1)


# ---------------------------------------------------------------------------------------------
# Marching tetrahedra.

_CORNERS = np.array([[(c >> 0) & 1, (c >> 1) & 1, (c >> 2) & 1] for c in range(8)])
# Freudenthal split: one tetrahedron per axis order (i, j, k), path 0 -> e_i -> e_i + e_j -> 7.
_ORDERS = ((0, 1, 2), (0, 2, 1), (1, 0, 2), (1, 2, 0), (2, 0, 1), (2, 1, 0))
_TETS = np.array([[0, 1 << i, (1 << i) | (1 << j), 7] for i, j, _ in _ORDERS])
_TET_SIGN = np.array([np.sign(np.linalg.det(np.eye(3)[list(o)])) for o in _ORDERS])


def _case_table():
    """Triangles of each of the 16 inside/outside cases of a tetrahedron.

    Returns (16, 2, 3, 2) int64 edge endpoints (local corners 0..3; -1 marks no triangle),
    wound so the normal points from inside to outside for a positively oriented tetrahedron.
    The winding is found on a regular tetrahedron with edge midpoints, where every case's
    surface is planar and separates the inside corners from the outside ones exactly.
    """
    ref = np.array([[1.0, 1.0, 1.0], [1.0, -1.0, -1.0], [-1.0, 1.0, -1.0], [-1.0, -1.0, 1.0]])
    if np.linalg.det(ref[1:] - ref[0]) < 0:
        ref = ref[[0, 2, 1, 3]]
    table = -np.ones((16, 2, 3, 2), dtype=np.int64)
    for case in range(16):
        inside = [c for c in range(4) if case >> c & 1]
        outside = [c for c in range(4) if not case >> c & 1]
        if len(inside) in (0, 4):
            continue
        if len(inside) == 1 or len(outside) == 1:
            lone, rest = (inside[0], outside) if len(inside) == 1 else (outside[0], inside)
            tris = [[(lone, rest[0]), (lone, rest[1]), (lone, rest[2])]]
        else:
            (a, b), (c, d) = inside, outside
            tris = [[(a, c), (a, d), (b, d)], [(a, c), (b, d), (b, c)]]
        direction = ref[outside].mean(axis=0) - ref[inside].mean(axis=0)
        for t, tri in enumerate(tris):
            p = np.array([(ref[u] + ref[v]) / 2 for u, v in tri])
            if np.cross(p[1] - p[0], p[2] - p[0]) @ direction < 0:
                tri = [tri[0], tri[2], tri[1]]
            table[case, t] = tri
    return table


def marching_tetrahedra(values, origin, step):
    """Polygonise the zero level set of a sampled field (negative inside).

    values : (nx, ny, nz) float64 samples at origin + step * (i, j, k).
    Returns vertices (m, 3) float64 and faces (k, 3) int64, outward wound.
    """
    nx, ny, nz = values.shape
    flat = values.ravel()
    inside = flat < 0.0
    # Cubes whose corners disagree: only these hold surface.
    ins3 = values < 0.0
    views = [ins3[i:nx - 1 + i, j:ny - 1 + j, k:nz - 1 + k] for i, j, k in _CORNERS]
    mixed = np.logical_or.reduce(views) & ~np.logical_and.reduce(views)
    cube = np.stack(np.nonzero(mixed), axis=1)
    corner_ids = ((cube[:, None, 0] + _CORNERS[None, :, 0]) * ny
                  + cube[:, None, 1] + _CORNERS[None, :, 1]) * nz + cube[:, None, 2] + _CORNERS[None, :, 2]
    tets = corner_ids[:, _TETS].reshape(-1, 4)  # (cubes * 6, 4), cube-major
    signs = np.tile(_TET_SIGN, len(corner_ids))
    case = (inside[tets] * (1 << np.arange(4))).sum(axis=1)
    table = _case_table()

    edges = []  # (k, 3, 2) global grid ids per triangle corner
    for c in range(1, 15):
        sel = np.nonzero(case == c)[0]
        for t in range(2):
            if table[c, t, 0, 0] < 0:
                continue
            e = tets[sel][:, table[c, t]]  # (s, 3, 2)
            flip = signs[sel] < 0
            e[flip] = e[flip][:, ::-1]
            edges.append((sel, t, e))
    # Keep the triangles in tetrahedron order so the output does not depend on the case loop.
    order_key = np.concatenate([sel * 2 + t for sel, t, _ in edges])
    tri_edges = np.concatenate([e for _, _, e in edges])[np.argsort(order_key, kind="stable")]

    lo = tri_edges.min(axis=2)
    hi = tri_edges.max(axis=2)
    keys = lo * flat.size + hi
    uniq, inverse = np.unique(keys.ravel(), return_inverse=True)
    u, v = uniq // flat.size, uniq % flat.size
    t = np.clip(flat[u] / (flat[u] - flat[v]), T_CLAMP, 1.0 - T_CLAMP)
    idx = np.stack(np.unravel_index(np.concatenate([u, v]), values.shape), axis=1)
    pos = np.asarray(origin, dtype=np.float64) + step * idx.astype(np.float64)
    pu, pv = pos[: len(u)], pos[len(u):]
    vertices = pu + t[:, None] * (pv - pu)
    faces = inverse.reshape(-1, 3).astype(np.int64)
    return vertices, faces


def relax(vertices, faces, *, iterations=6, newton_steps=3):
    """Even out the triangles, then put the vertices back on the zero level set.

    Marching tetrahedra leaves slivers. Each iteration moves every vertex half way to the mean
    of its neighbours, keeping only the part of that move tangent to the surface (normal from
    the area-weighted face normals). Newton steps x <- x - f(x) grad f / |grad f|^2 (forward
    differences) then project onto the surface again.

    vertices : (n, 3) float64, faces : (m, 3) int64 -> (n, 3) float64.
    """
    n = len(vertices)
    edges = np.concatenate([faces[:, [0, 1]], faces[:, [1, 2]], faces[:, [2, 0]]])
    edges = np.concatenate([edges, edges[:, ::-1]])
    degree = np.bincount(edges[:, 0], minlength=n).astype(np.float64)
    p = vertices.copy()
    for _ in range(iterations):
        face_n = np.cross(p[faces[:, 1]] - p[faces[:, 0]], p[faces[:, 2]] - p[faces[:, 0]])
        normal = np.zeros_like(p)
        for k in range(3):
            np.add.at(normal, faces[:, k], face_n)
        normal /= np.sqrt(np.sum(normal * normal, axis=1))[:, None]
        mean = np.zeros_like(p)
        np.add.at(mean, edges[:, 0], p[edges[:, 1]])
        move = mean / degree[:, None] - p
        move -= np.sum(move * normal, axis=1)[:, None] * normal
        p += 0.5 * move
    for _ in range(newton_steps):
        value, grad = _field_and_gradient(p)
        p -= (value / np.sum(grad * grad, axis=1))[:, None] * grad
    return p


def _field_and_gradient(points, eps=1e-5):
    """Field (n,) and forward-difference gradient (n, 3) at points (n, 3)."""
    value = figure_field(points)
    grad = np.stack([(figure_field(points + d) - value) / eps for d in np.eye(3) * eps], axis=1)
    return value, grad


# ---------------------------------------------------------------------------------------------
# Assembly and output.


def build():
    """Build the figure.

    Returns vertices (n, 3) float64 rounded to 6 decimals, uvs (n, 2) float64 rounded to 6
    decimals, faces (m, 3) int64 and groups: list of (name, first_face, face_count) in PARTS order.
    """
    lo = np.array([-0.80, -0.10, -1.10])
    hi = np.array([0.80, 2.10, 0.60])
    start = np.floor(lo / GRID_STEP).astype(np.int64)
    stop = np.ceil(hi / GRID_STEP).astype(np.int64)
    axes = [np.arange(a, b + 1) * GRID_STEP for a, b in zip(start, stop)]
    grid = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1)
    flat = grid.reshape(-1, 3)
    values = np.concatenate([figure_field(flat[i:i + 200_000])
                             for i in range(0, len(flat), 200_000)]).reshape(grid.shape[:3])
    if min(values[0].min(), values[-1].min(), values[:, 0].min(), values[:, -1].min(),
           values[:, :, 0].min(), values[:, :, -1].min()) <= 0:
        raise RuntimeError("the figure touches the grid boundary; widen the bounds")
    vertices, faces = marching_tetrahedra(values, start * GRID_STEP, GRID_STEP)
    vertices = relax(vertices, faces)
    tri = vertices[faces]
    face_n = np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0])
    if np.any(np.sum(face_n * _field_and_gradient(tri.mean(axis=1))[1], axis=1) <= 0):
        raise RuntimeError("relaxation turned a triangle inside out; use fewer iterations")

    # Faces part by part; vertices renumbered in order of first use.
    centroids = vertices[faces].mean(axis=1)
    part = part_of(centroids)
    order = np.argsort(part, kind="stable")
    faces, part = faces[order], part[order]
    first = np.unique(faces.ravel(), return_index=True)[1]
    used = faces.ravel()[np.sort(first)]
    renumber = np.empty(len(vertices), dtype=np.int64)
    renumber[used] = np.arange(len(used))
    vertices = vertices[used]
    faces = renumber[faces]
    groups = []
    for i, name in enumerate(PARTS):
        sel = np.nonzero(part == i)[0]
        if len(sel):
            groups.append((name, int(sel[0]), len(sel)))

    vertices = np.round(vertices, 6) + 0.0  # + 0.0 turns -0.0 into 0.0
    height = vertices[:, 1].max() - vertices[:, 1].min()
    u = np.abs(np.arctan2(vertices[:, 0], vertices[:, 2])) / np.pi
    v = (vertices[:, 1] - vertices[:, 1].min()) / height
    uvs = np.round(np.stack([u, v], axis=1), 6) + 0.0
    return vertices, uvs, faces, groups


def obj_text(vertices, uvs, faces, groups):
    """The OBJ file as a string (LF line ends, 1-based indices, one vt per v)."""
    lines = [
        "# Tock, the wind-up fox: pliant's demo model.",
        "# GENERATED by models/build.py; do not edit. Units: about 2 tall, +Y up, facing +Z.",
        f"# {len(vertices)} vertices, {len(faces)} triangles, groups: "
        + " ".join(name for name, _, _ in groups),
        "o mascot",
    ]
    lines += [f"v {x:.6f} {y:.6f} {z:.6f}" for x, y, z in vertices.tolist()]
    lines += [f"vt {s:.6f} {t:.6f}" for s, t in uvs.tolist()]
    one = faces + 1
    for name, first, count in groups:
        lines.append(f"g {name}")
        lines += [f"f {a}/{a} {b}/{b} {c}/{c}" for a, b, c in one[first:first + count].tolist()]
    return "\n".join(lines) + "\n"


def write_obj(path, text):
    """Write text to path through a temporary file in the same folder, then rename."""
    folder = os.path.dirname(os.path.abspath(path))
    fd, tmp = tempfile.mkstemp(prefix=".mascot-", suffix=".tmp", dir=folder)
    try:
        with os.fdopen(fd, "w", encoding="ascii", newline="\n") as fh:
            fh.write(text)
        os.chmod(tmp, 0o644)  # mkstemp makes 0600; a model is meant to be read by all
        os.replace(tmp, path)
    except BaseException:
        os.unlink(tmp)
        raise


def main(argv=None):
    parser = argparse.ArgumentParser(description="Build the demo model (Tock, the wind-up fox).")
    here = os.path.dirname(os.path.abspath(__file__))
    parser.add_argument("--out", default=os.path.join(here, "mascot.obj"),
                        help="OBJ file to write (default: mascot.obj next to this script)")
    parser.add_argument("--quiet", action="store_true", help="do not print the joints")
    args = parser.parse_args(argv)
    vertices, uvs, faces, groups = build()
    write_obj(args.out, obj_text(vertices, uvs, faces, groups))
    if not args.quiet:
        summary = {
            "vertices": len(vertices),
            "triangles": len(faces),
            "bounds": [vertices.min(axis=0).tolist(), vertices.max(axis=0).tolist()],
            "groups": {name: count for name, _, count in groups},
            "joints": {k: list(v) for k, v in JOINTS.items()},
        }
        json.dump(summary, sys.stdout, indent=1)
        sys.stdout.write("\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
