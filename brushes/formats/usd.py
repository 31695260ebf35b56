"""OpenUSD stages (.usd, .usda, .usdc) through OpenUSD's own ``pxr`` package (``usd-core``).

Reading composes the stage and takes every ``UsdGeom.Mesh`` it shows, in traversal order: its
points at the default time are moved to world space by the prim's local-to-world transform
(as for glTF) and concatenated; :attr:`MeshDoc.parts` records each prim's slice. Meshes seen
through an instance (``instanceable`` prims) or used as a ``PointInstancer`` prototype are
refused, as are meshes whose points are animated (time samples): one set of points cannot be
posed per instance or per frame. Texture coordinates come from the ``texCoord2f[]`` primvar
(``st`` first), normals from ``primvars:normals`` or ``normals``, groups from each mesh prim's
name and from its face ``GeomSubset`` prims (for recipe masks), materials from the bound
``UsdShade.Material`` names. A ``leftHanded`` mesh's polygons are reversed in the document so
that every triangle winds counter-clockwise seen from outside.

Writing a posed stage copies the source's root layer and adds, in that copy, the new points of
each mesh in its own local space (and its ``extent`` and stored normals, recomputed) as local
opinions; every other prim, attribute, time sample, variant, sublayer and reference is left as
it was (asset paths are re-pointed when the file moves to another folder). A local opinion is
the strongest, so the posed points hold whichever variant is selected.

:func:`export` writes a new stage from polygons (conversions), :func:`write_blend_shapes` a
corrective shape as UsdSkel ``BlendShape`` prims bound to their meshes.
"""
from __future__ import annotations

import os
import tempfile

import numpy as np

from brushes import surface
from brushes.atomic import atomic_write

from .document import MeshDoc, MeshError, MeshPart, Polygons

__all__ = ["load", "save", "export", "write_blend_shapes", "EXTENSIONS"]

EXTENSIONS = ("usd", "usda", "usdc")


def _pxr():
    try:
        from pxr import Gf, Sdf, Tf, Usd, UsdGeom, UsdShade, UsdSkel, UsdUtils, Vt
    except ImportError as exc:  # usd-core is a dependency; say so if it is missing
        raise MeshError(f"OpenUSD files need the usd-core package ({exc}); "
                        "pip install usd-core") from None
    return Gf, Sdf, Tf, Usd, UsdGeom, UsdShade, UsdSkel, UsdUtils, Vt


class _UsdSource:
    """What :func:`save` needs: the stage file and per part its prim and matrix."""

    def __init__(self, path, crate, records):
        self.path = path
        self.crate = crate  # the root layer is a binary crate file
        self.records = records  # list of dicts: prim path, matrix, faces (local), normals spec


def _world_matrix(xformable, Usd):
    """(4, 4) float64 column-vector matrix (p' = M @ p) of a prim's local-to-world transform."""
    m = np.array(xformable.ComputeLocalToWorldTransform(Usd.TimeCode.Default()), dtype=np.float64)
    return m.T  # USD stores row vectors: p' = p @ m


def _primvar(prim, UsdGeom, Sdf, *, role=None, names=()):
    """The first authored primvar with one of ``names`` (or of the type role), else None."""
    api = UsdGeom.PrimvarsAPI(prim)
    found = [api.GetPrimvar(n) for n in names if api.HasPrimvar(n)]
    found = [p for p in found if p.HasAuthoredValue()]
    if not found and role is not None:
        found = [p for p in api.GetPrimvars() if p.HasAuthoredValue()
                 and p.GetTypeName() == role]
    return found[0] if found else None


def _per_corner(values, indices, interpolation, counts, corners, n_vertices):
    """Rows of ``values`` and the row per corner, for vertex, varying, faceVarying or uniform
    interpolation; None when the data does not fit the mesh."""
    values = np.asarray(values, np.float64)
    if indices is not None and len(indices):
        index = np.asarray(indices, np.int64)
    else:
        index = None
    rows_needed = {"vertex": n_vertices, "varying": n_vertices, "faceVarying": len(corners),
                   "uniform": len(counts)}.get(interpolation)
    if rows_needed is None:
        return None
    if index is not None:
        if len(index) != rows_needed or (len(index) and index.max() >= len(values)):
            return None
        element = index
    else:
        if len(values) != rows_needed:
            return None
        element = np.arange(rows_needed)
    if interpolation in ("vertex", "varying"):
        return values, element[corners]
    if interpolation == "faceVarying":
        return values, element
    return values, np.repeat(element, counts)  # uniform: one value per face


def load(path, data: bytes | None = None) -> MeshDoc:
    """Read an OpenUSD stage (``data`` is unused: pxr reads the file and its layers)."""
    Gf, Sdf, Tf, Usd, UsdGeom, UsdShade, UsdSkel, UsdUtils, Vt = _pxr()
    try:
        stage = Usd.Stage.Open(os.fspath(path))
    except Exception as exc:  # noqa: BLE001 - pxr raises Tf.ErrorException and others
        text = " ".join(str(exc).split())
        raise MeshError(f"{path}: not a readable USD stage ({text[:200]})") from None
    if stage is None:
        raise MeshError(f"{path}: not a readable USD stage")
    prototypes = set()
    meshes = []
    for prim in stage.Traverse(Usd.TraverseInstanceProxies(Usd.PrimDefaultPredicate)):
        if prim.IsA(UsdGeom.PointInstancer):
            for target in UsdGeom.PointInstancer(prim).GetPrototypesRel().GetTargets():
                prototypes.add(target)
        if not prim.IsA(UsdGeom.Mesh):
            continue
        if prim.IsInstanceProxy():
            raise MeshError(f"{path}: mesh {prim.GetPath()} is instanced (through "
                            f"{_instance_of(prim)}); instanced meshes cannot be posed per instance")
        meshes.append(prim)
    for prim in meshes:
        for proto in prototypes:
            if prim.GetPath().HasPrefix(proto):
                raise MeshError(f"{path}: mesh {prim.GetPath()} is a PointInstancer prototype; "
                                "instanced meshes cannot be posed per instance")
    if not meshes:
        raise MeshError(f"{path}: no UsdGeom.Mesh prims found on the stage")
    all_v, all_counts, all_corners, parts, records = [], [], [], [], []
    uv_rows, uv_index, n_rows, n_index = [], [], [], []
    uv_ok = n_ok = True
    groups: dict = {}
    material_names: list = []
    material_index = []
    start = poly_start = 0
    for prim in meshes:
        mesh = UsdGeom.Mesh(prim)
        points_attr = mesh.GetPointsAttr()
        if points_attr.GetNumTimeSamples() > 0:
            raise MeshError(f"{path}: mesh {prim.GetPath()} has animated points "
                            f"({points_attr.GetNumTimeSamples()} time samples); pliant poses one "
                            "still shape")
        pts = points_attr.Get()
        if pts is None or len(pts) == 0:
            continue
        local = np.array(pts, dtype=np.float64).reshape(-1, 3)
        counts = np.array(mesh.GetFaceVertexCountsAttr().Get() or [], np.int64)
        corners = np.array(mesh.GetFaceVertexIndicesAttr().Get() or [], np.int64)
        if counts.sum() != len(corners) or np.any(counts < 3) or (
                len(corners) and (corners.min() < 0 or corners.max() >= len(local))):
            raise MeshError(f"{path}: mesh {prim.GetPath()} has faceVertexCounts and "
                            "faceVertexIndices that do not fit its points")
        matrix = _world_matrix(UsdGeom.Xformable(prim), Usd)
        if abs(np.linalg.det(matrix[:3, :3])) < 1e-300:
            raise MeshError(f"{path}: mesh {prim.GetPath()} has a singular transform (zero scale)")
        left = mesh.GetOrientationAttr().Get() == UsdGeom.Tokens.leftHanded
        flip = left != (np.linalg.det(matrix[:3, :3]) < 0)
        order = _corner_order(counts, reverse=flip)
        world = local @ matrix[:3, :3].T + matrix[:3, 3]
        all_v.append(world)
        all_counts.append(counts)
        all_corners.append(corners[order] + start)
        # texture coordinates
        st = _primvar(prim, UsdGeom, Sdf, names=("st", "st0", "UVMap"),
                      role=Sdf.ValueTypeNames.TexCoord2fArray)
        got = None
        if st is not None and uv_ok:
            got = _per_corner(st.Get(), st.GetIndices() if st.IsIndexed() else None,
                              st.GetInterpolation(), counts, corners, len(local))
        if got is None:
            uv_ok = False
        else:
            uv_index.append(got[1][order] + sum(len(r) for r in uv_rows))
            uv_rows.append(got[0][:, :2])
        # normals (primvars:normals wins over the normals attribute, as in UsdGeom)
        nspec = _normals_spec(prim, mesh, UsdGeom, Sdf)
        got = None
        normal_key = None
        if nspec is not None:
            attr, indices, interpolation = nspec
            got = _per_corner(attr.Get(), indices, interpolation, counts, corners, len(local))
            if got is not None and interpolation == "faceVarying":
                rows = np.round(got[0][got[1]], 6)
                normal_key = np.unique(np.concatenate([corners[:, None], rows], axis=1), axis=0,
                                       return_inverse=True)[1].reshape(-1)
        if got is None or not n_ok:
            n_ok = False
        else:
            inv_t = np.linalg.inv(matrix[:3, :3]).T
            rows = got[0] @ inv_t.T
            length = np.linalg.norm(rows, axis=1, keepdims=True)
            rows = np.divide(rows, length, out=np.zeros_like(rows), where=length > 0)
            n_index.append(got[1][order] + sum(len(r) for r in n_rows))
            n_rows.append(rows)
        # groups: the prim's own name, and its face subsets
        name = prim.GetName()
        polys_here = np.arange(poly_start, poly_start + len(counts), dtype=np.int64)
        _add(groups, name, polys_here)
        mats = np.full(len(counts), -1, np.int64)
        bound = UsdShade.MaterialBindingAPI(prim).ComputeBoundMaterial()[0]
        if bound:
            mats[:] = _material_row(material_names, bound.GetPrim().GetName())
        for subset in UsdGeom.Subset.GetAllGeomSubsets(mesh):
            if subset.GetElementTypeAttr().Get() != UsdGeom.Tokens.face:
                continue
            idx = np.array(subset.GetIndicesAttr().Get() or [], np.int64)
            idx = idx[(idx >= 0) & (idx < len(counts))]
            if subset.GetFamilyNameAttr().Get() != UsdShade.Tokens.materialBind:
                label = subset.GetPrim().GetCustomDataByKey("pliant:name") or subset.GetPrim().GetName()
                _add(groups, str(label), idx + poly_start)
            sub_bound = UsdShade.MaterialBindingAPI(subset.GetPrim()).ComputeBoundMaterial()[0]
            if sub_bound:
                mats[idx] = _material_row(material_names, sub_bound.GetPrim().GetName())
        material_index.append(mats)
        records.append({"prim": str(prim.GetPath()), "matrix": matrix, "left": left,
                        "normal_key": normal_key,
                         "start": start, "stop": start + len(local), "counts": counts,
                         "corners": corners, "normals": got is not None and _normals_name(nspec),
                         "normal_interpolation": None if nspec is None else nspec[2],
                         "normal_indexed": nspec is not None and nspec[1] is not None,
                         "extent": mesh.GetExtentAttr().HasAuthoredValue()})
        parts.append(MeshPart(name, start, start + len(local)))
        start += len(local)
        poly_start += len(counts)
    if start == 0:
        raise MeshError(f"{path}: the stage's meshes have no points")
    vertices = np.concatenate(all_v)
    polys = Polygons(np.concatenate(all_counts), np.concatenate(all_corners))
    if uv_ok and uv_rows:
        polys.uv, polys.uv_index = np.concatenate(uv_rows), np.concatenate(uv_index)
    if n_ok and n_rows:
        polys.normals, polys.normal_index = np.concatenate(n_rows), np.concatenate(n_index)
    polys.groups = {k: np.unique(v) for k, v in groups.items()}
    mats = np.concatenate(material_index)
    if material_names:
        polys.materials, polys.material_index = tuple(material_names), mats
    faces = polys.corners[polys.fan_triangles()] if len(polys.corners) else np.zeros((0, 3), np.int64)
    layer = stage.GetRootLayer()
    crate = _is_crate(layer.realPath)
    normals = "recomputed" if any(r["normals"] for r in records) else "absent"
    fmt = os.path.splitext(os.fspath(path))[1].lower().lstrip(".")
    return MeshDoc(vertices, faces, os.fspath(path), fmt, polys.uv if polys.uv is not None and
                   np.array_equal(polys.uv_index, polys.corners) else None, normals, tuple(parts),
                   _UsdSource(os.fspath(path), crate, records), polys.vertex_groups(), polys,
                   tuple(_unconverted(stage, meshes, Usd, UsdGeom, UsdShade, UsdSkel)))


def _instance_of(prim):
    p = prim
    while p and not p.IsInstance():
        p = p.GetParent()
    return p.GetPath() if p else "an instance"


def _add(groups, name, members):
    prev = groups.get(name)
    groups[name] = members if prev is None else np.concatenate([prev, members])


def _material_row(names, name):
    if name not in names:
        names.append(name)
    return names.index(name)


def _corner_order(counts, *, reverse):
    """Corner positions of each polygon, reversed per polygon when ``reverse``."""
    c = int(counts.sum())
    if not reverse:
        return np.arange(c)
    start = np.repeat(np.cumsum(counts) - counts, counts)
    within = np.arange(c) - start
    return start + np.repeat(counts, counts) - 1 - within


def _normals_spec(prim, mesh, UsdGeom, Sdf):
    """(attribute, indices or None, interpolation) of the normals UsdGeom uses, else None."""
    api = UsdGeom.PrimvarsAPI(prim)
    if api.HasPrimvar("normals"):
        pv = api.GetPrimvar("normals")
        if pv.HasAuthoredValue():
            if pv.GetAttr().GetNumTimeSamples() > 0:
                return None
            return pv.GetAttr(), (pv.GetIndices() if pv.IsIndexed() else None), pv.GetInterpolation()
    attr = mesh.GetNormalsAttr()
    if attr.HasAuthoredValue() and attr.GetNumTimeSamples() == 0:
        return attr, None, mesh.GetNormalsInterpolation()
    return None


def _normals_name(spec):
    return spec[0].GetName()


def _is_crate(real_path) -> bool:
    try:
        with open(real_path, "rb") as f:
            return f.read(8) == b"PXR-USDC"
    except OSError:
        return False


def _unconverted(stage, meshes, Usd, UsdGeom, UsdShade, UsdSkel):
    """What the stage holds that no conversion carries, as labels for the dropped-list."""
    out = []
    mesh_paths = {m.GetPath() for m in meshes}
    other = [p for p in stage.Traverse() if p.GetPath() not in mesh_paths
             and not p.IsA(UsdGeom.Xform) and p.GetTypeName() not in ("", "Scope", "GeomSubset")
             and not p.IsA(UsdShade.Material) and not p.IsA(UsdShade.Shader)]
    if other:
        out.append(f"other prims ({len(other)}, such as {other[0].GetTypeName()} {other[0].GetPath()})")
    if any(UsdGeom.PrimvarsAPI(m).HasPrimvar("displayColor")
           and UsdGeom.PrimvarsAPI(m).GetPrimvar("displayColor").HasAuthoredValue() for m in meshes):
        out.append("display colours")
    if any(p.IsA(UsdShade.Shader) for p in stage.Traverse()):
        out.append("material networks (names are kept)")
    if any(p.GetVariantSets().GetNames() for p in stage.Traverse()):
        out.append("variants other than the selected ones")
    if any(p.HasAPI(UsdSkel.BindingAPI) for p in meshes):
        out.append("skeletal bindings")
    return out


# --------------------------------------------------------------------------- writing


def _write_layer(layer, path, *, crate):
    """Write an Sdf layer to ``path`` atomically: text for .usda (and .usd from a text source),
    crate for .usdc (and .usd from a crate source)."""
    ext = os.path.splitext(os.fspath(path))[1].lower()
    if ext == ".usda" or (ext == ".usd" and not crate):
        data = layer.ExportToString().encode("utf-8")
    else:
        with tempfile.TemporaryDirectory(prefix="pliant-usd-") as tmp:
            scratch = os.path.join(tmp, "layer.usdc")
            if not layer.Export(scratch):
                raise MeshError(f"{path}: OpenUSD could not write the layer")
            with open(scratch, "rb") as f:
                data = f.read()
    with atomic_write(path) as f:
        f.write(data)


def _repoint_assets(layer, src_folder, out_folder, UsdUtils):
    """Relative asset paths of ``layer`` made to resolve from ``out_folder`` as they did from
    ``src_folder``."""
    if os.path.normcase(os.path.abspath(src_folder)) == os.path.normcase(os.path.abspath(out_folder)):
        return

    def move(asset):
        if not asset or os.path.isabs(asset) or ":" in asset.split("/")[0]:
            return asset
        target = os.path.normpath(os.path.join(src_folder, asset))
        if not os.path.exists(target):
            return asset
        rel = os.path.relpath(target, out_folder).replace(os.sep, "/")
        return rel if rel.startswith(".") else "./" + rel

    UsdUtils.ModifyAssetPaths(layer, move)


def save(doc: MeshDoc, vertices, path) -> None:
    """Write ``doc``'s stage to ``path`` with the new world positions ``vertices`` (n, 3)."""
    Gf, Sdf, Tf, Usd, UsdGeom, UsdShade, UsdSkel, UsdUtils, Vt = _pxr()
    src: _UsdSource = doc._source
    layer = Sdf.Layer.OpenAsAnonymous(src.path)
    if layer is None:
        raise MeshError(f"{src.path}: cannot read the USD layer again")
    _repoint_assets(layer, os.path.dirname(os.path.abspath(src.path)),
                    os.path.dirname(os.path.abspath(os.fspath(path))), UsdUtils)
    for rec in src.records:
        inv = np.linalg.inv(rec["matrix"])
        world = vertices[rec["start"]:rec["stop"]]
        local = world @ inv[:3, :3].T + inv[:3, 3]
        spec = Sdf.CreatePrimInLayer(layer, rec["prim"])
        _set(spec, "points", Sdf.ValueTypeNames.Point3fArray,
             Vt.Vec3fArray.FromNumpy(np.ascontiguousarray(local, np.float32)), Sdf)
        stored = local.astype(np.float32).astype(np.float64)
        if rec["extent"]:
            extent = np.stack([stored.min(axis=0), stored.max(axis=0)]).astype(np.float32)
            _set(spec, "extent", Sdf.ValueTypeNames.Float3Array, Vt.Vec3fArray.FromNumpy(extent), Sdf)
        if rec["normals"]:
            normals = _recomputed_normals(stored, rec)
            if normals is not None:
                _set(spec, rec["normals"], Sdf.ValueTypeNames.Normal3fArray,
                     Vt.Vec3fArray.FromNumpy(np.ascontiguousarray(normals, np.float32)), Sdf)
    _write_layer(layer, path, crate=src.crate)


def _set(prim_spec, name, type_name, value, Sdf):
    attr = prim_spec.attributes[name] if name in prim_spec.attributes else None
    if attr is None:
        attr = Sdf.AttributeSpec(prim_spec, name, type_name)
    attr.default = value


def _recomputed_normals(points, rec):
    """New local-space normals laid out as stored: per vertex, per face, or per face corner
    (corners that shared a vertex and a normal value share the new one, so hard edges stay
    hard); None for indexed normals, which keep their values."""
    if rec["normal_indexed"]:
        return None
    counts, corners = rec["counts"], rec["corners"]
    polys = Polygons(counts, corners)
    faces = corners[polys.fan_triangles()]
    sign = -1.0 if rec["left"] else 1.0  # a leftHanded mesh winds clockwise seen from outside
    interpolation = rec["normal_interpolation"]
    if interpolation in ("vertex", "varying"):
        n = sign * surface.vertex_normals(points, faces, normalize=False)
    else:
        per_poly = np.zeros((len(counts), 3))
        np.add.at(per_poly, polys.triangle_polygon, surface.face_cross_products(points, faces))
        per_poly *= sign
        if interpolation == "uniform":
            n = per_poly
        elif interpolation == "faceVarying" and rec["normal_key"] is not None:
            key = rec["normal_key"]
            per_corner = np.repeat(per_poly, counts, axis=0)
            sums = np.stack([np.bincount(key, weights=per_corner[:, c], minlength=key.max() + 1)
                             for c in range(3)], axis=1)
            n = sums[key]
        else:
            return None
    length = np.linalg.norm(n, axis=1, keepdims=True)
    return np.divide(n, length, out=np.zeros_like(n), where=length > 0)


def _define_mesh(stage, path, vertices, polys: Polygons, *, Sdf, Tf, UsdGeom, UsdShade, Vt,
                 materials_root):
    """A UsdGeom.Mesh at ``path`` with points, polygons, indexed ``st`` and normals primvars,
    group GeomSubsets (family ``pliant:group``, unrestricted) and material subsets bound to
    Material prims under ``materials_root``. Returns (mesh, renamed {name: identifier})."""
    mesh = UsdGeom.Mesh.Define(stage, path)
    pts = np.ascontiguousarray(vertices, np.float32)
    mesh.CreatePointsAttr(Vt.Vec3fArray.FromNumpy(pts))
    mesh.CreateFaceVertexCountsAttr(Vt.IntArray.FromNumpy(polys.counts.astype(np.int32)))
    mesh.CreateFaceVertexIndicesAttr(Vt.IntArray.FromNumpy(polys.corners.astype(np.int32)))
    mesh.CreateSubdivisionSchemeAttr(UsdGeom.Tokens.none)
    if len(pts):
        mesh.CreateExtentAttr(Vt.Vec3fArray.FromNumpy(np.stack([pts.min(axis=0), pts.max(axis=0)])))
    api = UsdGeom.PrimvarsAPI(mesh)
    if polys.uv is not None:
        pv = api.CreatePrimvar("st", Sdf.ValueTypeNames.TexCoord2fArray, UsdGeom.Tokens.faceVarying)
        pv.Set(Vt.Vec2fArray.FromNumpy(np.ascontiguousarray(polys.uv, np.float32)))
        pv.SetIndices(Vt.IntArray.FromNumpy(polys.uv_index.astype(np.int32)))
    if polys.normals is not None:
        n = np.asarray(polys.normals, np.float64)
        length = np.linalg.norm(n, axis=1, keepdims=True)
        n = np.divide(n, length, out=np.zeros_like(n), where=length > 0)
        pv = api.CreatePrimvar("normals", Sdf.ValueTypeNames.Normal3fArray, UsdGeom.Tokens.faceVarying)
        pv.Set(Vt.Vec3fArray.FromNumpy(np.ascontiguousarray(n, np.float32)))
        pv.SetIndices(Vt.IntArray.FromNumpy(polys.normal_index.astype(np.int32)))
    renamed = {}
    taken = set()

    def identifier(name):
        ident = Tf.MakeValidIdentifier(name) or "group"
        base, k = ident, 1
        while ident in taken:
            ident, k = f"{base}_{k}", k + 1
        taken.add(ident)
        if ident != name:
            renamed[name] = ident
        return ident

    for name, members in polys.groups.items():
        subset = UsdGeom.Subset.CreateGeomSubset(
            mesh, identifier(name), UsdGeom.Tokens.face,
            Vt.IntArray.FromNumpy(np.unique(np.asarray(members)).astype(np.int32)), "pliant:group")
        subset.GetPrim().SetCustomDataByKey("pliant:name", name)
    if polys.groups:
        UsdGeom.Subset.SetFamilyType(mesh, "pliant:group", UsdGeom.Tokens.unrestricted)
    if polys.materials and polys.material_index is not None:
        UsdShade.MaterialBindingAPI.Apply(mesh.GetPrim())
        for j, name in enumerate(polys.materials):
            members = np.flatnonzero(polys.material_index == j)
            if not len(members):
                continue
            mat_path = materials_root.AppendChild(Tf.MakeValidIdentifier(name) or f"material{j}")
            material = UsdShade.Material.Get(stage, mat_path) or UsdShade.Material.Define(stage, mat_path)
            subset = UsdGeom.Subset.CreateGeomSubset(
                mesh, identifier("material_" + name), UsdGeom.Tokens.face,
                Vt.IntArray.FromNumpy(members.astype(np.int32)), UsdShade.Tokens.materialBind)
            binding = UsdShade.MaterialBindingAPI.Apply(subset.GetPrim())
            binding.Bind(material)
        UsdGeom.Subset.SetFamilyType(mesh, UsdShade.Tokens.materialBind, UsdGeom.Tokens.nonOverlapping)
    return mesh, renamed


def _new_stage(Usd, UsdGeom, *, up_axis="Y", meters_per_unit=1.0):
    stage = Usd.Stage.CreateInMemory()
    UsdGeom.SetStageUpAxis(stage, UsdGeom.Tokens.y if up_axis == "Y" else UsdGeom.Tokens.z)
    UsdGeom.SetStageMetersPerUnit(stage, float(meters_per_unit))
    return stage


def export(vertices, polys: Polygons, *, path, name="mesh") -> bytes:
    """Bytes of a new stage (``path``'s extension picks text or crate) holding one mesh
    ``/<name>/<name>`` with everything :func:`_define_mesh` carries; up axis Y, 1 meter per unit
    (pliant does not know the source's units)."""
    Gf, Sdf, Tf, Usd, UsdGeom, UsdShade, UsdSkel, UsdUtils, Vt = _pxr()
    stage = _new_stage(Usd, UsdGeom)
    ident = Tf.MakeValidIdentifier(name) or "mesh"
    root = UsdGeom.Xform.Define(stage, f"/{ident}")
    stage.SetDefaultPrim(root.GetPrim())
    if polys.materials:
        UsdGeom.Scope.Define(stage, root.GetPath().AppendChild("Materials"))
    _define_mesh(stage, root.GetPath().AppendChild(ident), vertices, polys, Sdf=Sdf, Tf=Tf,
                 UsdGeom=UsdGeom, UsdShade=UsdShade, Vt=Vt,
                 materials_root=root.GetPath().AppendChild("Materials"))
    ext = os.path.splitext(os.fspath(path))[1].lower()
    layer = stage.GetRootLayer()
    if ext == ".usda":
        return layer.ExportToString().encode("utf-8")
    with tempfile.TemporaryDirectory(prefix="pliant-usd-") as tmp:
        scratch = os.path.join(tmp, "layer.usdc")
        layer.Export(scratch)
        with open(scratch, "rb") as f:
            return f.read()


def write_blend_shapes(path, rest: MeshDoc, posed_vertices, *, name="corrective", weight=0.0,
                       tolerance=0.0) -> None:
    """Write the corrective shape as UsdSkel BlendShape prims bound to their meshes.

    The file holds a ``SkelRoot`` (the default prim) with, per mesh of ``rest`` (each USD mesh
    prim, else one mesh), the rest mesh in world space and a child ``BlendShape`` named
    ``name`` with ``offsets`` = posed - rest and, when only part of the mesh moves by more than
    ``tolerance``, ``pointIndices``. Each mesh has ``UsdSkelBindingAPI`` with
    ``skel:blendShapes`` and ``skel:blendShapeTargets``; a ``Skeleton`` with no joints carries a
    ``SkelAnimation`` whose ``blendShapeWeights`` hold ``weight``. Up axis and meters per unit
    come from a USD rest stage, else Y and 1.

    path : .usd, .usda or .usdc; rest : MeshDoc; posed_vertices : (n, 3) float64 world positions.
    """
    Gf, Sdf, Tf, Usd, UsdGeom, UsdShade, UsdSkel, UsdUtils, Vt = _pxr()
    up, mpu = "Y", 1.0
    if rest.format in EXTENSIONS:
        src_stage = Usd.Stage.Open(rest.path)
        up = "Z" if UsdGeom.GetStageUpAxis(src_stage) == UsdGeom.Tokens.z else "Y"
        mpu = UsdGeom.GetStageMetersPerUnit(src_stage)
    stage = _new_stage(Usd, UsdGeom, up_axis=up, meters_per_unit=mpu)
    root = UsdSkel.Root.Define(stage, "/Corrective")
    stage.SetDefaultPrim(root.GetPrim())
    skel = UsdSkel.Skeleton.Define(stage, "/Corrective/Skeleton")
    skel.CreateJointsAttr([])
    anim = UsdSkel.Animation.Define(stage, "/Corrective/Skeleton/Pose")
    shape = Tf.MakeValidIdentifier(name) or "corrective"
    anim.CreateBlendShapesAttr([shape])
    anim.CreateBlendShapeWeightsAttr(Vt.FloatArray([float(weight)]))
    anim.CreateJointsAttr([])
    UsdSkel.BindingAPI.Apply(skel.GetPrim()).CreateAnimationSourceRel().SetTargets([anim.GetPath()])
    polys = rest.polygons if rest.polygons is not None else Polygons.from_triangles(rest.faces)
    parts = rest.parts or (MeshPart("mesh", 0, len(rest.vertices)),)
    if len(parts) == 1:
        parts = (MeshPart(parts[0].name, 0, len(rest.vertices)),)
    starts = np.cumsum(polys.counts) - polys.counts
    first_vertex = polys.corners[starts] if len(starts) else np.zeros(0, np.int64)
    taken = set()
    for part in parts:
        ident = Tf.MakeValidIdentifier(part.name) or "mesh"
        base, k = ident, 1
        while ident in taken or ident in ("Skeleton",):
            ident, k = f"{base}_{k}", k + 1
        taken.add(ident)
        sel = np.flatnonzero((first_vertex >= part.start) & (first_vertex < part.stop))
        sub = _sub_polygons(polys, sel, part.start)
        sub.groups.pop(part.name, None)  # the mesh prim's own name is a group already
        verts = rest.vertices[part.start:part.stop]
        mesh, _ = _define_mesh(stage, root.GetPath().AppendChild(ident), verts, sub, Sdf=Sdf,
                               Tf=Tf, UsdGeom=UsdGeom, UsdShade=UsdShade, Vt=Vt,
                               materials_root=root.GetPath().AppendChild("Materials"))
        offsets = (np.asarray(posed_vertices[part.start:part.stop], np.float64) - verts)
        blend = UsdSkel.BlendShape.Define(stage, mesh.GetPath().AppendChild(shape))
        moved = np.flatnonzero(np.linalg.norm(offsets, axis=1) > tolerance)
        if len(moved) < len(offsets):
            blend.CreateOffsetsAttr(Vt.Vec3fArray.FromNumpy(np.ascontiguousarray(offsets[moved], np.float32)))
            blend.CreatePointIndicesAttr(Vt.IntArray.FromNumpy(moved.astype(np.int32)))
        else:
            blend.CreateOffsetsAttr(Vt.Vec3fArray.FromNumpy(np.ascontiguousarray(offsets, np.float32)))
        binding = UsdSkel.BindingAPI.Apply(mesh.GetPrim())
        binding.CreateSkeletonRel().SetTargets([skel.GetPath()])
        binding.CreateBlendShapesAttr([shape])
        binding.CreateBlendShapeTargetsRel().SetTargets([blend.GetPath()])
    _write_layer(stage.GetRootLayer(), path, crate=True)


def _sub_polygons(polys: Polygons, sel, offset) -> Polygons:
    """The polygons ``sel`` with vertex indices shifted by ``-offset`` (one mesh of several)."""
    starts = np.cumsum(polys.counts) - polys.counts
    counts = polys.counts[sel]
    idx = np.repeat(starts[sel], counts) + (np.arange(int(counts.sum()))
                                             - np.repeat(np.cumsum(counts) - counts, counts))
    out = Polygons(counts, polys.corners[idx] - offset)
    if polys.uv is not None:
        used, inv = np.unique(polys.uv_index[idx], return_inverse=True)
        out.uv, out.uv_index = polys.uv[used], inv.reshape(-1)
    if polys.normals is not None:
        used, inv = np.unique(polys.normal_index[idx], return_inverse=True)
        out.normals, out.normal_index = polys.normals[used], inv.reshape(-1)
    remap = np.full(len(polys.counts), -1, np.int64)
    remap[sel] = np.arange(len(sel))
    for gname, members in polys.groups.items():
        m = remap[np.asarray(members, np.int64)]
        m = m[m >= 0]
        if len(m):
            out.groups[gname] = m
    if polys.material_index is not None:
        out.materials, out.material_index = polys.materials, polys.material_index[sel]
    return out
