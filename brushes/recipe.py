"""Recipes: a list of brush strokes in our own JSON format; load, validate, save and replay.

A recipe file::

    {"format": "pliant-recipe", "version": 1,
     "strokes": [
       {"brush": "grab", "center": [0, 1, 0], "radius": 0.3, "move": [0.1, 0, 0], "poisson": 0.5},
       {"brush": "twist", "center": [0, 2, 0], "radius": 0.2, "axis": [0, 1, 0], "degrees": 30,
        "mask": {"group": "head"}, "pins": [[0, 1.8, 0]]}
     ]}

A stroke's keys are its brush's keyword arguments (the parameters of the registered class's
constructor, see :mod:`brushes.registry`) plus the optional keys

``flow`` : bool, default true
    Integrate the brush as a velocity field (true) or add its displacement once (false).
``pins`` : list of [x, y, z]
    Points the stroke must hold still.
``mirror`` : {"normal": [x, y, z], "point": [x, y, z]}
    Act with the brush and its reflection in this plane (``point`` defaults to the origin).
``mask`` : {"group": name} or {"weights": [w0, w1, ...]}
    Per-vertex weights in [0, 1]: 1 on the vertices of the named mesh group and 0 elsewhere,
    or one weight per vertex.

Replaying a recipe is exactly the API called stroke by stroke: each stroke builds its brush
with ``cls(**params)`` (mirrored by ``brushes.mirror`` if asked) and calls
``brush.apply(points, flow=flow, pins=pins, mask=weights)``; the output of one stroke is the
input of the next. Numbers are read into Python floats, which hold every float64 exactly, and
written with ``repr``, which reads back to the same float, so save -> load changes nothing.

Every problem found on load is reported, one line each, naming the stroke and field:
``strokes[2].radius: must be a positive number, got -0.1``.
"""

from __future__ import annotations

import inspect
import json
import math
import os
import re
from dataclasses import dataclass

import numpy as np

from brushes import checks, registry

__all__ = ["FORMAT", "VERSION", "OPTIONAL_KEYS", "RecipeError", "Stroke", "Recipe",
           "parse_recipe", "parse_stroke", "apply_stroke", "load_recipe", "recipe_to_dict", "dumps_recipe", "save_recipe"]

FORMAT = "pliant-recipe"
VERSION = 1
OPTIONAL_KEYS = ("flow", "pins", "mirror", "mask")
_TOP_KEYS = ("format", "version", "strokes")


class RecipeError(ValueError):
    """A recipe is malformed. ``problems`` holds one line per problem; ``source`` the file."""

    def __init__(self, problems, source=None):
        self.problems = [problems] if isinstance(problems, str) else list(problems)
        self.source = None if source is None else os.fspath(source)
        prefix = f"{self.source}: " if self.source else ""
        super().__init__("\n".join(prefix + p for p in self.problems))


# --------------------------------------------------------------------------- JSON reading


class _NonFinite:
    """Stands for a JSON NaN/Infinity constant until validation reports where it was."""

    def __init__(self, name):
        self.name = name

    def __repr__(self):
        return self.name


class _Object(dict):
    """A JSON object that remembers keys given more than once."""

    duplicates: tuple = ()


def _object_pairs(pairs):
    obj = _Object(pairs)
    if len(obj) != len(pairs):
        seen, dup = set(), []
        for k, _ in pairs:
            if k in seen and k not in dup:
                dup.append(k)
            seen.add(k)
        obj.duplicates = tuple(dup)
    return obj


def _loads(text: str):
    return json.loads(text, parse_constant=_NonFinite, object_pairs_hook=_object_pairs)


# --------------------------------------------------------------------------- value checks
# Each check takes (value, where, problems) and returns the normalised value (plain Python:
# floats, lists) or None after appending a problem line.


def _show(value) -> str:
    text = repr(value) if isinstance(value, (_NonFinite, str)) else json.dumps(value, default=repr)
    return text if len(text) <= 60 else text[:57] + "..."


def _is_number(x) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool)


def _number(value, where, problems, *, positive=False, unit=False):
    what = ("a positive number" if positive else
            "a number in [0, 1]" if unit else "a finite number")
    if _is_number(value):
        try:
            as_float = float(value)
        except OverflowError:  # an integer too large for a float
            as_float = math.inf
    if isinstance(value, _NonFinite) or (_is_number(value) and not math.isfinite(as_float)):
        problems.append(f"{where}: must be {what} (NaN and Infinity are not allowed), "
                        f"got {_show(value)}")
        return None
    if not _is_number(value):
        problems.append(f"{where}: must be {what}, got {_show(value)}")
        return None
    if (positive and not value > 0) or (unit and not 0 <= value <= 1):
        problems.append(f"{where}: must be {what}, got {_show(value)}")
        return None
    return as_float


def _vector(value, where, problems, *, length=3, nonzero=False):
    if not isinstance(value, list) or len(value) != length:
        problems.append(f"{where}: must be a list of {length} numbers, got {_show(value)}")
        return None
    out = [_number(x, f"{where}[{i}]", problems) for i, x in enumerate(value)]
    if any(x is None for x in out):
        return None
    if nonzero and not any(out):
        problems.append(f"{where}: must not be the zero vector")
        return None
    return out


def _string(value, where, problems):
    if not isinstance(value, str) or not value:
        problems.append(f"{where}: must be a non-empty string, got {_show(value)}")
        return None
    return value


def _boolean(value, where, problems):
    if not isinstance(value, bool):
        problems.append(f"{where}: must be true or false, got {_show(value)}")
        return None
    return value


def _json_value(value, where, problems):
    """Any JSON value whose numbers are all finite (parameters of plugin brushes)."""
    if isinstance(value, _NonFinite) or (isinstance(value, float) and not math.isfinite(value)):
        problems.append(f"{where}: must be finite (NaN and Infinity are not allowed), "
                        f"got {_show(value)}")
        return None
    if isinstance(value, list):
        return [_json_value(x, f"{where}[{i}]", problems) for i, x in enumerate(value)]
    if isinstance(value, dict):
        return {k: _json_value(v, f"{where}.{k}", problems) for k, v in value.items()}
    if value is None or isinstance(value, (bool, int, float, str)):
        return value
    problems.append(f"{where}: must be a JSON value, got {type(value).__name__}")
    return None


def _plain(value):
    """numpy arrays and scalars -> lists and Python scalars (for strokes built in code)."""
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, dict):
        return {k: _plain(v) for k, v in value.items()}
    return value


# --------------------------------------------------------------------------- strokes


def _signature(cls):
    """(all keyword names in order, required names) of a brush class's constructor."""
    names, required = [], []
    for p in inspect.signature(cls).parameters.values():
        if p.kind in (p.POSITIONAL_OR_KEYWORD, p.KEYWORD_ONLY):
            names.append(p.name)
            if p.default is p.empty:
                required.append(p.name)
    return names, required


def _check_optional(d, where, problems):
    """Validate flow/pins/mirror/mask of a stroke dict; returns their normalised values."""
    flow = _boolean(d["flow"], f"{where}.flow", problems) if "flow" in d else True
    pins = None
    if "pins" in d:
        raw = d["pins"]
        if not isinstance(raw, list):
            problems.append(f"{where}.pins: must be a list of [x, y, z] points, got {_show(raw)}")
        else:
            pins = [_vector(p, f"{where}.pins[{i}]", problems) for i, p in enumerate(raw)] or None
    mirror = None
    if "mirror" in d:
        raw = d["mirror"]
        if not isinstance(raw, dict):
            problems.append(f"{where}.mirror: must be an object "
                            f'{{"normal": [x, y, z], "point": [x, y, z]}}, got {_show(raw)}')
        else:
            _duplicates(raw, f"{where}.mirror", problems)
            for k in raw:
                if k not in ("normal", "point"):
                    problems.append(f"{where}.mirror.{k}: unknown key; known keys: normal, point")
            if "normal" not in raw:
                problems.append(f"{where}.mirror.normal: missing")
                normal = None
            else:
                normal = _vector(raw["normal"], f"{where}.mirror.normal", problems, nonzero=True)
            point = (_vector(raw["point"], f"{where}.mirror.point", problems)
                     if "point" in raw else [0.0, 0.0, 0.0])
            mirror = {"normal": normal, "point": point}
    mask = None
    if "mask" in d:
        raw = d["mask"]
        hint = '{"group": name} or {"weights": [w0, w1, ...]}'
        if not isinstance(raw, dict) or len(raw) != 1:
            problems.append(f"{where}.mask: must be {hint}, got {_show(raw)}")
        elif "group" in raw:
            group = _string(raw["group"], f"{where}.mask.group", problems)
            mask = {"group": group}
        elif "weights" in raw:
            w = raw["weights"]
            if not isinstance(w, list) or not w:
                problems.append(f"{where}.mask.weights: must be a non-empty list of numbers in "
                                f"[0, 1], one per vertex, got {_show(w)}")
            else:
                weights = []
                for i, x in enumerate(w):
                    local = []
                    weights.append(_number(x, f"{where}.mask.weights[{i}]", local, unit=True))
                    if local:  # report only the first bad weight of a long list
                        problems.extend(local)
                        break
                mask = {"weights": weights}
        else:
            key = next(iter(raw))
            problems.append(f"{where}.mask.{key}: unknown key; use {hint}")
    return flow, pins, mirror, mask


def _duplicates(obj, where, problems):
    for k in getattr(obj, "duplicates", ()):
        problems.append(f"{where}.{k}: given more than once" if where else f"{k}: given more than once")


def _check_stroke(d, where):
    """Validate a stroke dict. Returns (fields dict for Stroke, problems list)."""
    problems = []
    if not isinstance(d, dict):
        return None, [f'{where}: must be an object with a "brush" key, got {_show(d)}']
    _duplicates(d, where, problems)
    if "brush" not in d:
        return None, problems + [f"{where}.brush: missing; known brushes: "
                                 + ", ".join(registry.kinds())]
    kind = d["brush"]
    if not isinstance(kind, str):
        return None, problems + [f"{where}.brush: must be a brush name, got {_show(kind)}"]
    try:
        cls = registry.lookup(kind)
    except ValueError as exc:
        if kind in registry.kinds():  # an installed plugin that fails to load
            return None, problems + [f"{where}.brush: {exc}".replace(": brush: ", ": ", 1)]
        return None, problems + [f"{where}.brush: unknown brush {kind!r}; known brushes: "
                                 + ", ".join(registry.kinds())]
    names, required = _signature(cls)
    allowed = ["brush", *names, *(k for k in OPTIONAL_KEYS if k not in names)]
    for k in d:
        if k not in allowed:
            problems.append(f"{where}.{k}: unknown key for brush {kind!r}; known keys: "
                            + ", ".join(allowed[1:]))
    for k in required:
        if k not in d:
            problems.append(f"{where}.{k}: missing (required by brush {kind!r})")
    # JSON-level checks only (finite numbers); each brush checks its own fields and its errors
    # name the field (`brushes.checks.FieldError`), so nothing is checked twice here.
    params = {k: _json_value(d[k], f"{where}.{k}", problems) for k in names if k in d}
    flow, pins, mirror, mask = _check_optional(
        {k: v for k, v in d.items() if k in OPTIONAL_KEYS and k not in names}, where, problems)
    if problems:
        return None, problems
    fields = {"kind": kind, "params": params, "flow": flow, "pins": pins, "mirror": mirror,
              "mask": mask}
    try:
        _build(fields, where)
    except RecipeError as exc:
        problems.extend(exc.problems)
    except TypeError as exc:  # a constructor that does not take its own parameters by keyword
        problems.append(f"{where}: brush {kind!r} cannot be built from keywords: {exc}")
    return (None if problems else fields), problems


def _build(fields, where="stroke"):
    """Build the brush of a validated stroke; a bad field raises RecipeError naming it under `where`."""
    try:
        brush = registry.lookup(fields["kind"])(**fields["params"])
    except checks.FieldError as exc:
        raise RecipeError([str(exc.within(where))]) from None
    except ValueError as exc:
        # a plug-in brush that raises a plain ValueError "name: reason", as DEVELOPERS.md allows
        name, sep, _ = str(exc).partition(":")
        known = _signature(registry.lookup(fields["kind"]))[0]
        raise RecipeError([f"{where}.{exc}" if sep and name in known else f"{where}: {exc}"]) from None
    if fields["mirror"] is not None:
        from brushes.mirror import mirror

        try:
            brush = mirror(brush, fields["mirror"]["normal"], fields["mirror"]["point"])
        except checks.FieldError as exc:
            raise RecipeError([str(exc.within(f"{where}.mirror"))]) from None
    return brush


@dataclass(frozen=True)
class Stroke:
    """One brush stroke: a brush kind with its keyword arguments, plus how to apply it.

    kind : str, a registry kind (``brushes.registry.kinds()``).
    params : dict, the brush constructor's keyword arguments (JSON-ready: lists, floats).
    flow : bool, integrate as a velocity field (True) or add the displacement once.
    pins : list of [x, y, z] or None, points held still.
    mirror : {"normal": [3], "point": [3]} or None, act with the brush and its reflection.
    mask : {"group": str} or {"weights": [n]} or None, per-vertex weights in [0, 1].

    Construction validates and normalises (numpy values become lists and floats) and raises
    :class:`RecipeError` with one line per problem.
    """

    kind: str
    params: dict
    flow: bool = True
    pins: list | None = None
    mirror: dict | None = None
    mask: dict | None = None

    def __post_init__(self):
        d = {"brush": self.kind, **_plain(dict(self.params))}
        for k in OPTIONAL_KEYS:
            value = _plain(getattr(self, k))
            if value is not None and not (k == "flow" and value is True):
                d[k] = value
        fields, problems = _check_stroke(d, "stroke")
        if problems:
            raise RecipeError(problems)
        for k, v in fields.items():
            object.__setattr__(self, k, v)

    @classmethod
    def from_brush(cls, brush, *, flow=True, pins=None, mirror=None, mask=None) -> "Stroke":
        """The stroke of a brush object: ``Stroke(brush.kind, brush.params(), ...)``.

        A brush made by ``brushes.mirror`` gives its inner brush with the mirror plane.
        """
        from brushes.mirror import Mirrored

        if isinstance(brush, Mirrored):
            if mirror is not None:
                raise ValueError("mirror: the brush is already mirrored")
            p = brush.params()
            mirror = {"normal": p["normal"], "point": p["point"]}
            brush = brush.brush
        return cls(brush.kind, brush.params(), flow=flow, pins=pins, mirror=mirror, mask=mask)

    def to_dict(self) -> dict:
        """The stroke as it appears in a recipe file (defaults left out)."""
        d = {"brush": self.kind, **self.params}
        if self.flow is not True:
            d["flow"] = self.flow
        for k in ("pins", "mirror", "mask"):
            if getattr(self, k) is not None:
                d[k] = getattr(self, k)
        return d

    def brush(self):
        """The brush object: ``lookup(kind)(**params)``, wrapped by ``brushes.mirror`` if asked."""
        return _build(self.__dict__)

    def weights(self, n: int, *, groups=None, where="stroke"):
        """The mask as (n,) float64 weights, or None without a mask.

        groups : mapping name -> vertex indices (1-D int) or boolean (n,) array, the mesh's
            named groups (OBJ ``g`` groups); needed for a ``{"group": name}`` mask.
        """
        if self.mask is None:
            return None
        if "weights" in self.mask:
            w = np.asarray(self.mask["weights"], dtype=np.float64)
            if len(w) != n:
                raise RecipeError(f"{where}.mask.weights: has {len(w)} weights but the mesh has "
                                  f"{n} vertices")
            return w
        name = self.mask["group"]
        if not groups:
            raise RecipeError(f"{where}.mask.group: the mesh has no named groups, so the group "
                              f"{name!r} cannot be found")
        if name not in groups:
            raise RecipeError(f"{where}.mask.group: the mesh has no group {name!r}; its groups: "
                              + ", ".join(sorted(groups)))
        members = np.asarray(groups[name])
        w = np.zeros(n, dtype=np.float64)
        if members.dtype == bool:
            if members.shape != (n,):
                raise ValueError(f"groups[{name!r}]: a boolean mask must have shape ({n},), "
                                 f"got {members.shape}")
            w[members] = 1.0
        else:
            if members.ndim != 1 or (members.size and not np.issubdtype(members.dtype, np.integer)):
                raise ValueError(f"groups[{name!r}]: must be 1-D vertex indices or a boolean "
                                 f"mask, got dtype {members.dtype} shape {members.shape}")
            if members.size and (members.min() < 0 or members.max() >= n):
                raise ValueError(f"groups[{name!r}]: vertex indices must lie in [0, {n})")
            w[members] = 1.0
        return w

    def apply(self, points, *, groups=None, where="stroke"):
        """Apply the stroke. points : (n, 3) float -> (n, 3) float64 new positions.

        Exactly ``self.brush().apply(points, flow=flow, pins=pins, mask=weights)``. `where`
        names the stroke in errors (``"strokes[3]"`` gives ``strokes[3].pins[1]: ...``).
        """
        pts = checks.points("points", points)
        pins = None if self.pins is None else np.asarray(self.pins, dtype=np.float64)
        mask = self.weights(len(pts), groups=groups, where=where)
        try:
            return self.brush().apply(pts, flow=self.flow, pins=pins, mask=mask)
        except checks.FieldError as exc:
            # the stroke's own fields, and brush fields refused only when applied (a flow whose
            # handles would meet on their way)
            if exc.field.split("[")[0] in ("pins", "mask", *self.params):
                raise RecipeError([str(exc.within(where))]) from None
            raise


@dataclass(frozen=True)
class Recipe:
    """An ordered sequence of strokes. ``Recipe(strokes)``; picklable and comparable."""

    strokes: tuple = ()

    def __post_init__(self):
        strokes = tuple(self.strokes)
        for i, s in enumerate(strokes):
            if not isinstance(s, Stroke):
                raise ValueError(f"strokes[{i}]: must be a Stroke, got {type(s).__name__}")
        object.__setattr__(self, "strokes", strokes)

    def __len__(self):
        return len(self.strokes)

    def __iter__(self):
        return iter(self.strokes)

    def apply(self, points, *, groups=None):
        """Apply the strokes in order. points : (n, 3) float -> (n, 3) float64 (a new array).

        groups : mapping name -> vertex indices or boolean (n,) mask, for group masks.
        """
        pts = checks.points("points", points)
        out = pts.copy()
        for i, stroke in enumerate(self.strokes):
            out = stroke.apply(out, groups=groups, where=f"strokes[{i}]")
        return out


def parse_stroke(d) -> Stroke:
    """A :class:`Stroke` from one stroke dict of a recipe (``{"brush": kind, ...}``)."""
    fields, problems = _check_stroke(d, "stroke")
    if problems:
        raise RecipeError(problems)
    return Stroke(**fields)


def apply_stroke(points, stroke, *, groups=None) -> np.ndarray:
    """Apply one stroke, a :class:`Stroke` or a stroke dict. points : (n, 3) -> (n, 3) float64."""
    if not isinstance(stroke, Stroke):
        stroke = parse_stroke(stroke)
    return stroke.apply(points, groups=groups)


# --------------------------------------------------------------------------- files


def parse_recipe(obj) -> Recipe:
    """A :class:`Recipe` from a parsed JSON object (dict); RecipeError lists every problem."""
    if not isinstance(obj, dict):
        raise RecipeError(f'recipe: must be a JSON object {{"format": "{FORMAT}", ...}}, '
                          f"got {_show(obj)}")
    if "format" not in obj:
        raise RecipeError(f'format: missing; a recipe starts {{"format": "{FORMAT}", '
                          f'"version": {VERSION}, "strokes": [...]}}')
    if obj["format"] != FORMAT:
        raise RecipeError(f"format: must be {FORMAT!r}, got {_show(obj['format'])}; "
                          "this is not a pliant recipe")
    version = obj.get("version")
    if "version" not in obj:
        raise RecipeError(f"version: missing; this pliant reads version {VERSION}")
    if not _is_number(version) or version != VERSION:
        raise RecipeError(f"version: this pliant reads version {VERSION}, the recipe says "
                          f"{_show(version)}; upgrade pliant, or re-save the recipe as version "
                          f"{VERSION} with the pliant that wrote it")
    problems = []
    _duplicates(obj, "", problems)
    for k in obj:
        if k not in _TOP_KEYS:
            problems.append(f"{k}: unknown key; a recipe has the keys " + ", ".join(_TOP_KEYS))
    raw = obj.get("strokes")
    fields = []
    if "strokes" not in obj:
        problems.append("strokes: missing (a list of strokes, may be empty)")
    elif not isinstance(raw, list):
        problems.append(f"strokes: must be a list of strokes, got {_show(raw)}")
    else:
        for i, d in enumerate(raw):
            f, p = _check_stroke(d, f"strokes[{i}]")
            problems.extend(p)
            fields.append(f)
    if problems:
        raise RecipeError(problems)
    return Recipe(tuple(Stroke(**f) for f in fields))


def load_recipe(path) -> Recipe:
    """Read and validate a recipe file (UTF-8 JSON). RecipeError names the file and each problem."""
    with open(path, "rb") as fh:
        data = fh.read()
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise RecipeError(f"not UTF-8 text (byte {exc.start})", source=path) from None
    try:
        obj = _loads(text)
    except json.JSONDecodeError as exc:
        raise RecipeError(f"bad JSON at line {exc.lineno}, column {exc.colno}: {exc.msg}",
                          source=path) from None
    except RecursionError:
        raise RecipeError("bad JSON: nested too deeply", source=path) from None
    except ValueError as exc:  # e.g. an integer with more digits than Python converts
        raise RecipeError(f"bad JSON: {str(exc).split(';')[0]}", source=path) from None
    try:
        return parse_recipe(obj)
    except RecipeError as exc:
        raise RecipeError(exc.problems, source=path) from None


def recipe_to_dict(recipe: Recipe) -> dict:
    """The JSON-ready dict of a recipe; ``parse_recipe(recipe_to_dict(r)) == r``."""
    return {"format": FORMAT, "version": VERSION, "strokes": [s.to_dict() for s in recipe]}


def dumps_recipe(recipe: Recipe) -> str:
    """The recipe file's text: one stroke per line, floats written with ``repr`` (exact)."""
    d = recipe_to_dict(recipe)
    lines = [json.dumps(s, allow_nan=False, separators=(", ", ": ")) for s in d["strokes"]]
    body = ",\n    ".join(lines)
    strokes = f"[\n    {body}\n  ]" if lines else "[]"
    return (f'{{\n  "format": {json.dumps(FORMAT)},\n  "version": {VERSION},\n'
            f'  "strokes": {strokes}\n}}\n')


def save_recipe(recipe: Recipe, path) -> None:
    """Write ``recipe`` to ``path`` atomically (temporary file in the same folder, then rename)."""
    from brushes.atomic import atomic_write

    if not isinstance(recipe, Recipe):
        raise ValueError(f"recipe: must be a Recipe, got {type(recipe).__name__}")
    text = dumps_recipe(recipe)
    with atomic_write(path, mode="w", encoding="utf-8", newline="\n") as fh:
        fh.write(text)
