"""Tests for brushes.registry: built-ins, register/lookup, and plugins found by entry point."""

import sys

import numpy as np
import pytest

import brushes
from brushes import registry
from brushes.recipe import RecipeError, parse_recipe

BUILTINS = ("grab", "pinch", "scale", "twist")


class Lift:
    """A small third-party style brush: a Gaussian bump along +Y.

    u(x) = height * exp(-|x - c|^2 / r^2) * e_y; with flow=False, apply adds u once.
    """

    kind = "lift"

    def __init__(self, center, radius, height, *, sharpness=1.0):
        if not radius > 0:
            raise ValueError(f"radius: must be positive, got {radius}")
        self.center = np.asarray(center, dtype=np.float64)
        self.radius = float(radius)
        self.height = float(height)
        self.sharpness = float(sharpness)

    def params(self):
        return {"center": self.center.tolist(), "radius": self.radius, "height": self.height,
                "sharpness": self.sharpness}

    def displacement(self, points):
        d2 = np.sum((points - self.center) ** 2, axis=1)
        u = np.zeros_like(points)
        u[:, 1] = self.height * np.exp(-self.sharpness * d2 / self.radius**2)
        return u

    def apply(self, points, *, flow=True, pins=None, mask=None):
        u = self.displacement(points)
        if mask is not None:
            u = u * np.asarray(mask)[:, None]
        return points + u


class Bump(brushes.Brush):
    """The same bump as a ``brushes.Brush`` subclass: it inherits ``apply`` (the engine's flow).

    u(x) = height * g(x) e_y with g = exp(-|x - c|^2 / r^2); J = e_y (grad u_y)^T with
    grad u_y = -2 height g (x - c) / r^2. J has rank one, so its spectral norm is |grad u_y|,
    largest at |x - c| = r / sqrt(2): sqrt(2) |height| exp(-1/2) / r (calculus by hand).
    """

    kind = "bump"

    def __init__(self, center, radius, height):
        self.center = np.asarray(center, dtype=np.float64)
        self.radius = float(radius)
        self.height = float(height)

    def params(self):
        return {"center": self.center.tolist(), "radius": self.radius, "height": self.height}

    def displacement(self, points, out=None):
        pts = np.asarray(points, dtype=np.float64)
        g = np.exp(-np.sum((pts - self.center) ** 2, axis=1) / self.radius**2)
        u = np.zeros_like(pts) if out is None else out
        u[:] = 0.0
        u[:, 1] = self.height * g
        return u

    def jacobian(self, points):
        pts = np.asarray(points, dtype=np.float64)
        g = np.exp(-np.sum((pts - self.center) ** 2, axis=1) / self.radius**2)
        J = np.zeros((len(pts), 3, 3))
        J[:, 1, :] = -2.0 * self.height * g[:, None] * (pts - self.center) / self.radius**2
        return J

    def lipschitz(self):
        return np.sqrt(2.0) * abs(self.height) * np.exp(-0.5) / self.radius


@pytest.fixture
def fresh(monkeypatch):
    """Registry state as in a new process (entry points not yet read); restored afterwards."""
    monkeypatch.setattr(registry, "_classes", {})
    monkeypatch.setattr(registry, "_explicit", set())
    monkeypatch.setattr(registry, "_plugins", None)
    return registry


def install(tmp_path, monkeypatch, entries, name="workshop_brushes"):
    """Make an installed distribution in tmp_path whose entry points importlib.metadata finds.

    entries : {kind: "module:Class"} for the group pliant.brushes.
    """
    info = tmp_path / f"{name}-0.1.dist-info"
    info.mkdir()
    (info / "METADATA").write_text(f"Metadata-Version: 2.1\nName: {name}\nVersion: 0.1\n")
    lines = ["[pliant.brushes]"] + [f"{k} = {v}" for k, v in entries.items()]
    (info / "entry_points.txt").write_text("\n".join(lines) + "\n")
    monkeypatch.syspath_prepend(str(tmp_path))


# --- built-ins and explicit registration ---------------------------------------------------


def test_builtins_are_the_engine_classes():
    assert set(BUILTINS) <= set(registry.kinds())
    assert registry.kinds() == sorted(registry.kinds())
    assert registry.lookup("grab") is brushes.Grab
    assert registry.lookup("twist") is brushes.Twist
    assert registry.lookup("scale") is brushes.Scale
    assert registry.lookup("pinch") is brushes.Pinch


def test_unknown_kind_lists_known_ones(fresh):
    with pytest.raises(ValueError, match=r"^brush: unknown brush 'smudge'; known: grab, handles, pinch, "
                                         r"scale, twist"):
        registry.lookup("smudge")


def test_register_lookup_unregister(fresh):
    registry.register("lift", Lift)
    assert registry.lookup("lift") is Lift
    assert "lift" in registry.kinds()
    registry.register("lift", Lift)  # the same class again is fine
    registry.unregister("lift")
    assert "lift" not in registry.kinds()
    with pytest.raises(ValueError, match="unknown brush 'lift'"):
        registry.lookup("lift")
    with pytest.raises(ValueError, match=r"^kind: 'lift' was not registered"):
        registry.unregister("lift")


def test_register_refuses_bad_input(fresh):
    with pytest.raises(ValueError, match=r"^kind: must be a lower-case name"):
        registry.register("Lift Brush", Lift)
    with pytest.raises(ValueError, match=r"^kind: must be a lower-case name"):
        registry.register("", Lift)
    with pytest.raises(ValueError, match=r"^cls: brush 'lift': must be a class, got Lift"):
        registry.register("lift", Lift([0, 0, 0], 1, 1))
    with pytest.raises(ValueError, match=r"^cls: brush 'lift': .*has no apply"):
        registry.register("lift", dict)
    with pytest.raises(ValueError, match=r"^kind: brush 'grab' is already registered; "
                                         r"pass replace=True"):
        registry.register("grab", Lift)
    registry.register("lift", Lift)
    with pytest.raises(ValueError, match="already registered"):
        registry.register("lift", type("Other", (Lift,), {}))


def test_replacing_a_builtin_and_getting_it_back(fresh):
    registry.register("grab", Lift, replace=True)
    assert registry.lookup("grab") is Lift
    registry.unregister("grab")
    assert registry.lookup("grab") is brushes.Grab


# --- plugins through the entry-point group pliant.brushes -----------------------------------


def test_entry_point_plugin_is_found_and_used_in_a_recipe(fresh, tmp_path, monkeypatch):
    install(tmp_path, monkeypatch, {"lift": f"{__name__}:Lift"})
    assert "lift" in registry.kinds()
    assert registry.lookup("lift") is Lift

    stroke = {"brush": "lift", "center": [0, 1, 0], "radius": 0.5, "height": 0.2}
    r = parse_recipe({"format": "pliant-recipe", "version": 1, "strokes": [stroke]})
    pts = np.random.default_rng(5).uniform(-1, 2, size=(50, 3))
    want = Lift([0, 1, 0], 0.5, 0.2).apply(pts, flow=True, pins=None, mask=None)
    assert np.array_equal(r.apply(pts), want)
    # hand check of one point: at the centre the bump is the full height (exp(0) = 1)
    np.testing.assert_allclose(r.apply(np.array([[0.0, 1.0, 0.0]])), [[0.0, 1.2, 0.0]])

    # the keys allowed for the plugin come from its constructor's signature
    bad = dict(stroke, strength=3)
    with pytest.raises(RecipeError) as info:
        parse_recipe({"format": "pliant-recipe", "version": 1, "strokes": [bad]})
    assert info.value.problems == [
        "strokes[0].strength: unknown key for brush 'lift'; known keys: center, radius, height, "
        "sharpness, flow, pins, mirror, mask"]
    # and its constructor's own errors come back with the stroke
    with pytest.raises(RecipeError) as info:
        parse_recipe({"format": "pliant-recipe", "version": 1,
                      "strokes": [dict(stroke, radius=-1)]})
    assert info.value.problems == ["strokes[0].radius: must be positive, got -1"]
    # plugin parameters are plain JSON, still finite
    with pytest.raises(RecipeError, match=r"strokes\[0\]\.height: must be finite"):
        parse_recipe({"format": "pliant-recipe", "version": 1,
                      "strokes": [dict(stroke, height=float("inf"))]})


def test_brush_subclass_plugin_uses_the_engine_flow(fresh, tmp_path, monkeypatch):
    install(tmp_path, monkeypatch, {"bump": f"{__name__}:Bump"})
    stroke = {"brush": "bump", "center": [0, 1, 0], "radius": 0.4, "height": 0.15}
    pts = np.random.default_rng(9).uniform(-0.8, 1.8, size=(200, 3))
    for flow in (True, False):
        r = parse_recipe({"format": "pliant-recipe", "version": 1,
                          "strokes": [dict(stroke, flow=flow, pins=[[0.0, 0.2, 0.0]])]})
        want = Bump([0, 1, 0], 0.4, 0.15).apply(pts, flow=flow, pins=np.array([[0.0, 0.2, 0.0]]))
        assert np.array_equal(r.apply(pts), want)
    # flow=False without pins is points + u: the Gaussian by hand
    r = parse_recipe({"format": "pliant-recipe", "version": 1,
                      "strokes": [dict(stroke, flow=False)]})
    g = np.exp(-np.sum((pts - [0, 1, 0]) ** 2, axis=1) / 0.16)
    np.testing.assert_allclose(r.apply(pts), pts + np.outer(0.15 * g, [0, 1, 0]), rtol=0, atol=1e-15)
    # the flow moves points along +Y only (the velocity has no x or z part), and by no more
    # than the height (the speed is at most height over unit pseudo-time)
    r = parse_recipe({"format": "pliant-recipe", "version": 1, "strokes": [stroke]})
    moved = r.apply(pts) - pts
    assert np.all(moved[:, [0, 2]] == 0) and moved[:, 1].max() <= 0.15


def test_plugin_module_is_imported_only_when_looked_up(fresh, tmp_path, monkeypatch):
    (tmp_path / "lazy_workshop_plugin.py").write_text(
        "from " + __name__ + " import Lift\n\nclass Late(Lift):\n    kind = 'late'\n")
    install(tmp_path, monkeypatch, {"late": "lazy_workshop_plugin:Late"})
    monkeypatch.delitem(sys.modules, "lazy_workshop_plugin", raising=False)
    assert "late" in registry.kinds()
    assert "lazy_workshop_plugin" not in sys.modules  # discovered, not imported
    cls = registry.lookup("late")
    assert cls.__name__ == "Late" and "lazy_workshop_plugin" in sys.modules


def test_entry_points_are_read_once(fresh, tmp_path, monkeypatch):
    first, second = tmp_path / "a", tmp_path / "b"
    first.mkdir(), second.mkdir()
    install(first, monkeypatch, {"lift": f"{__name__}:Lift"}, name="first_dist")
    assert "lift" in registry.kinds()
    install(second, monkeypatch, {"hop": f"{__name__}:Lift"}, name="second_dist")
    assert "hop" not in registry.kinds()  # installed after discovery: seen by the next process


def test_broken_plugin_fails_alone(fresh, tmp_path, monkeypatch):
    install(tmp_path, monkeypatch, {"ghost": "no_such_workshop_module:Ghost",
                                    "notabrush": "json:dumps",
                                    "lift": f"{__name__}:Lift"})
    with pytest.raises(ValueError, match=r"^brush: plugin 'ghost' \(no_such_workshop_module:Ghost\) "
                                         r"failed to load: ModuleNotFoundError"):
        registry.lookup("ghost")
    with pytest.raises(ValueError, match=r"^brush: plugin 'notabrush' \(json:dumps\): must be a class"):
        registry.lookup("notabrush")
    assert registry.lookup("lift") is Lift
    with pytest.raises(RecipeError) as info:
        parse_recipe({"format": "pliant-recipe", "version": 1, "strokes": [{"brush": "ghost"}]})
    assert info.value.problems[0].startswith("strokes[0].brush: plugin 'ghost'")


def test_plugin_cannot_take_a_builtin_or_registered_name(fresh, tmp_path, monkeypatch):
    install(tmp_path, monkeypatch, {"grab": f"{__name__}:Lift", "mine": f"{__name__}:Lift"})
    registry.register("mine", brushes.Twist)
    assert registry.lookup("grab") is brushes.Grab
    assert registry.lookup("mine") is brushes.Twist
    assert registry.kinds().count("grab") == 1
