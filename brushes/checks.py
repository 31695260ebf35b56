"""The one set of argument checkers, and their error wording, for the engine, formats and viewer.

Every checker converts its value, checks its shape and range, and raises `FieldError` (a
`ValueError`) whose message starts with the name the caller passed and whose `field` attribute is
that name. Layers above (recipes, the command) add their own context by prefixing the field, for
example ``strokes[2].radius``, instead of reading messages back.

    >>> vector("center", (0, 1, 2))
    array([0., 1., 2.])
    >>> positive("radius", -1)
    Traceback (most recent call last):
    FieldError: radius: must be a positive number, got -1
"""
from __future__ import annotations

import math

import numpy as np


class FieldError(ValueError):
    """A bad argument: `field` names it (``"radius"``, ``"strokes[2].move"``), `reason` says why.

    str(error) is ``f"{field}: {reason}"``.
    """

    def __init__(self, field, reason):
        self.field = str(field)
        self.reason = str(reason)
        super().__init__(f"{self.field}: {self.reason}")

    def within(self, prefix):
        """The same error with its field prefixed: ``within("strokes[2]")`` -> ``strokes[2].radius``.

        A field that starts with ``[`` is joined without a dot (``pins`` + ``[1]``).
        """
        joiner = "" if self.field.startswith("[") else "."
        return FieldError(f"{prefix}{joiner}{self.field}", self.reason)


def number(name, value):
    """A finite float. Booleans are refused (True is not a radius)."""
    if isinstance(value, (bool, np.bool_, str, bytes)):
        raise FieldError(name, f"must be a number, got {value!r}")
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise FieldError(name, f"must be a number, got {value!r}") from None
    if not math.isfinite(v):
        raise FieldError(name, f"must be finite, got {value!r}")
    return v


def positive(name, value):
    """A finite float > 0."""
    v = number(name, value)
    if v <= 0:
        raise FieldError(name, f"must be a positive number, got {value!r}")
    return v


def poisson(value, name="poisson"):
    """Poisson's ratio in (-1, 0.5], the range of a stable isotropic material (common practice)."""
    v = number(name, value)
    if not (-1.0 < v <= 0.5):
        raise FieldError(name, f"Poisson's ratio must be in (-1, 0.5], got {value!r}")
    return v


def _numeric(value):
    """`value` as a float64 array; text and booleans are refused rather than converted."""
    if not _all_numbers(value):
        raise TypeError("not numbers")
    return np.array(value, dtype=np.float64)


def _all_numbers(value):
    if isinstance(value, np.ndarray):
        return value.dtype.kind in "iuf"
    if isinstance(value, (list, tuple)):
        return all(_all_numbers(v) for v in value)
    return isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, (bool, np.bool_))


def vector(name, value, length=3):
    """A finite (length,) float64 array."""
    try:
        arr = _numeric(value)
    except (TypeError, ValueError):
        raise FieldError(name, f"must be {length} numbers, got {value!r}") from None
    if arr.shape != (length,):
        raise FieldError(name, f"must be {length} numbers, got shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise FieldError(name, f"must be finite, got {arr.tolist()}")
    return arr


def nonzero_vector(name, value):
    """A finite, nonzero (3,) float64 array (an axis or a plane normal)."""
    arr = vector(name, value)
    if not np.any(arr):
        raise FieldError(name, "must not be the zero vector")
    return arr


def matrix3(name, value):
    """A finite (3, 3) float64 array."""
    try:
        arr = _numeric(value)
    except (TypeError, ValueError):
        raise FieldError(name, f"must be a 3x3 matrix of numbers, got {value!r}") from None
    if arr.shape != (3, 3):
        raise FieldError(name, f"must be a 3x3 matrix, got shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise FieldError(name, "must be finite")
    return arr


def points(name, value, *, rows=None, keep_float32=False, allow_single=False, letter="n"):
    """An (n, 3) array of finite numbers.

    rows : int or None, the number of rows required (for example the vertices of a document).
    keep_float32 : a float32 array is passed through as it is (the kernels take both); anything
        else becomes float64.
    allow_single : a (3,) input is taken as one row (pins given as one point).
    letter : the name of the row count in messages ("m" for pins: "(m, 3)").
    """
    try:
        arr = np.asarray(value)
        if not (keep_float32 and arr.dtype == np.float32):
            arr = np.asarray(arr, dtype=np.float64)
    except (TypeError, ValueError):
        raise FieldError(name, f"must be an ({letter}, 3) array of numbers, got {type(value).__name__}") from None
    if allow_single and arr.shape == (3,):
        arr = arr[None, :]
    if allow_single and arr.size == 0:
        arr = arr.reshape(0, 3)
    if arr.ndim != 2 or arr.shape[1] != 3:
        raise FieldError(name, f"must have shape ({letter}, 3), got {arr.shape}")
    if rows is not None and len(arr) != rows:
        raise FieldError(name, f"must have shape ({rows}, 3), got {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise FieldError(name, "must be finite (found NaN or infinity)")
    return arr


def faces(name, value, n_vertices=None, *, allow_empty=True):
    """An (m, 3) int64 array of vertex indices in [0, n_vertices)."""
    arr = np.asarray(value)
    if arr.ndim != 2 or arr.shape[1] != 3:
        raise FieldError(name, f"must have shape (m, 3), got {arr.shape}")
    if not allow_empty and len(arr) == 0:
        raise FieldError(name, "must hold at least one triangle")
    if arr.size and not np.issubdtype(arr.dtype, np.integer):
        raise FieldError(name, f"must hold integers, got dtype {arr.dtype}")
    if n_vertices is not None and arr.size and (arr.min() < 0 or arr.max() >= n_vertices):
        raise FieldError(name, f"indices must lie in [0, {n_vertices}), got [{arr.min()}, {arr.max()}]")
    return np.ascontiguousarray(arr, dtype=np.int64)


def weights(name, value, n):
    """An (n,) float64 array of finite weights in [0, 1] (a mask: one weight per point)."""
    try:
        arr = np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError):
        raise FieldError(name, f"must be ({n},) numbers in [0, 1], one per point") from None
    if arr.shape != (n,):
        raise FieldError(name, f"must have shape ({n},), one weight per point, got {arr.shape}")
    if not np.all(np.isfinite(arr)) or arr.min(initial=0.0) < 0.0 or arr.max(initial=0.0) > 1.0:
        raise FieldError(name, "weights must be finite and in [0, 1]")
    return arr


def choice(name, value, options):
    """`value` if it is one of `options` (a sequence of strings)."""
    if not isinstance(value, str) or value not in options:
        raise FieldError(name, f"must be one of {', '.join(repr(o) for o in options)}, got {value!r}")
    return value
