"""Tests for brushes.recipe: the recipe format, its validation, saving and replay."""

import json
import math
import os
import pickle

import numpy as np
import pytest

import brushes
from brushes.recipe import (
    Recipe,
    RecipeError,
    Stroke,
    apply_stroke,
    dumps_recipe,
    load_recipe,
    parse_recipe,
    parse_stroke,
    recipe_to_dict,
    save_recipe,
)

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))

GRAB = {"brush": "grab", "center": [0, 1, 0], "radius": 0.3, "move": [0.1, 0, 0],
        "poisson": 0.5, "falloff": "wide"}
TWIST = {"brush": "twist", "center": [0, 1.2, 0], "radius": 0.4, "axis": [0, 1, 0], "degrees": 30}
SCALE = {"brush": "scale", "center": [0.3, 0.8, 0], "radius": 0.4, "factor": 1.2, "poisson": 0.3}
PINCH = {"brush": "pinch", "center": [0.2, 1, 0], "radius": 0.3,
         "gradient": [[0.1, 0, 0], [0, -0.05, 0], [0, 0, -0.05]]}


def doc(*strokes, **top):
    d = {"format": "pliant-recipe", "version": 1, "strokes": [dict(s) for s in strokes]}
    d.update(top)
    return d


def problems_of(obj):
    with pytest.raises(RecipeError) as info:
        parse_recipe(obj)
    return info.value.problems


def only_problem(obj):
    p = problems_of(obj)
    assert len(p) == 1, p
    return p[0]


def write(tmp_path, text, name="r.json"):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


@pytest.fixture
def points():
    rng = np.random.default_rng(11)
    return rng.uniform([-0.6, 0.4, -0.5], [0.6, 1.6, 0.5], size=(300, 3))


# --- parsing the example from the format's description -------------------------------------


def test_example_parses_into_strokes():
    r = parse_recipe(doc(GRAB, TWIST, SCALE, PINCH))
    assert [s.kind for s in r] == ["grab", "twist", "scale", "pinch"]
    s = r.strokes[0]
    # numbers become floats, vectors lists; optional keys take their defaults
    assert s.params == {"center": [0.0, 1.0, 0.0], "radius": 0.3, "move": [0.1, 0.0, 0.0],
                        "poisson": 0.5, "falloff": "wide"}
    assert (s.flow, s.pins, s.mirror, s.mask) == (True, None, None, None)
    assert isinstance(s.brush(), brushes.Grab)


def test_optional_keys_parse():
    s = parse_stroke({**GRAB, "flow": False, "pins": [[0, 0, 0], [1, 2, 3]],
                      "mirror": {"normal": [1, 0, 0]}, "mask": {"group": "arm_left"}})
    assert s.flow is False
    assert s.pins == [[0.0, 0.0, 0.0], [1.0, 2.0, 3.0]]
    assert s.mirror == {"normal": [1.0, 0.0, 0.0], "point": [0.0, 0.0, 0.0]}
    assert s.mask == {"group": "arm_left"}
    assert parse_stroke({**GRAB, "pins": []}).pins is None  # no pins


# --- validation: every problem one line, naming stroke and field ----------------------------


def test_bad_json_names_line_and_column(tmp_path):
    # hand-counted: line 3 is ` "strokes": [}`; the "}" is its 14th character
    path = write(tmp_path, '{"format": "pliant-recipe",\n "version": 1,\n "strokes": [}\n')
    with pytest.raises(RecipeError, match=r"bad JSON at line 3, column 14"):
        load_recipe(path)


@pytest.mark.parametrize("token", ["NaN", "Infinity", "-Infinity"])
def test_json_nonfinite_constants_are_rejected(tmp_path, token):
    text = json.dumps(doc(GRAB)).replace('"radius": 0.3', f'"radius": {token}')
    with pytest.raises(RecipeError) as info:
        load_recipe(write(tmp_path, text))
    assert info.value.problems == [
        f"strokes[0].radius: must be finite (NaN and Infinity are not allowed), "
        f"got {token}"]


def test_overflowing_json_number_is_rejected(tmp_path):
    # 1e999 is beyond float64 (max about 1.8e308, IEEE 754); Python's json reads it as inf
    text = json.dumps(doc(GRAB)).replace('"center": [0, 1, 0]', '"center": [0, 1e999, 0]')
    with pytest.raises(RecipeError, match=r"^.*: strokes\[0\]\.center\[1\]: must be finite"):
        load_recipe(write(tmp_path, text))


def test_nonfinite_python_numbers_are_rejected():
    p = only_problem(doc({**TWIST, "degrees": float("nan")}))
    assert p.startswith("strokes[0].degrees: must be finite")
    p = only_problem(doc({**PINCH, "gradient": [[0, 0, 0], [0, math.inf, 0], [0, 0, 0]]}))
    assert p.startswith("strokes[0].gradient[1][1]: must be finite")


def test_unknown_key_lists_the_brush_keywords():
    p = only_problem(doc(GRAB, {**TWIST, "strength": 2}))
    # the twist keywords of the API contract, then the optional stroke keys
    assert p == ("strokes[1].strength: unknown key for brush 'twist'; known keys: center, radius, "
                 "axis, degrees, poisson, falloff, flow, pins, mirror, mask")


def test_a_key_of_another_brush_is_unknown():
    p = only_problem(doc({**GRAB, "degrees": 10}))
    assert p.startswith("strokes[0].degrees: unknown key for brush 'grab'")


@pytest.mark.parametrize("field, value, message", [
    ("radius", -0.1, "strokes[0].radius: must be a positive number, got -0.1"),
    ("radius", 0, "strokes[0].radius: must be a positive number, got 0"),
    ("radius", "big", 'strokes[0].radius: must be a number, got \'big\''),
    ("radius", True, "strokes[0].radius: must be a number, got True"),
    ("radius", [0.3], "strokes[0].radius: must be a number, got [0.3]"),
    ("center", [0, 1], "strokes[0].center: must be 3 numbers, got shape (2,)"),
    ("center", [0, 1, 0, 0], "strokes[0].center: must be 3 numbers, got shape (4,)"),
    ("center", "origin", "strokes[0].center: must be 3 numbers, got 'origin'"),
    ("center", [0, "1", 0], "strokes[0].center: must be 3 numbers, got [0, '1', 0]"),
    ("move", None, "strokes[0].move: must be 3 numbers, got None"),
    ("poisson", "0.5", "strokes[0].poisson: must be a number, got '0.5'"),
    ("falloff", 3, "strokes[0].falloff: must be one of 'wide', 'medium', 'tight', got 3"),
    ("flow", 1, "strokes[0].flow: must be true or false, got 1"),
    ("flow", "yes", "strokes[0].flow: must be true or false, got 'yes'"),
    ("pins", [[0, 0, 0], 5], "strokes[0].pins[1]: must be a list of 3 numbers, got 5"),
    ("pins", [[0, 0]], "strokes[0].pins[0]: must be a list of 3 numbers, got [0, 0]"),
    ("pins", {"at": [0, 0, 0]}, "strokes[0].pins: must be a list of [x, y, z] points"),
    ("mirror", [1, 0, 0], "strokes[0].mirror: must be an object"),
    ("mirror", {"point": [0, 0, 0]}, "strokes[0].mirror.normal: missing"),
    ("mirror", {"normal": [0, 0, 0]}, "strokes[0].mirror.normal: must not be the zero vector"),
    ("mirror", {"normal": [1, 0, 0], "origin": [0, 0, 0]},
     "strokes[0].mirror.origin: unknown key; known keys: normal, point"),
    ("mask", "head", 'strokes[0].mask: must be {"group": name} or {"weights": [w0, w1, ...]}'),
    ("mask", {"group": "a", "weights": [1]}, "strokes[0].mask: must be {\"group\": name}"),
    ("mask", {"group": 7}, "strokes[0].mask.group: must be a non-empty string, got 7"),
    ("mask", {"vertices": [1]}, "strokes[0].mask.vertices: unknown key"),
    ("mask", {"weights": []}, "strokes[0].mask.weights: must be a non-empty list"),
    ("mask", {"weights": [0, 1.5, 2]}, "strokes[0].mask.weights[1]: must be a number in [0, 1], got 1.5"),
])
def test_wrong_types_and_lengths(field, value, message):
    p = only_problem(doc({**GRAB, field: value}))
    assert p.startswith(message), p


def test_twist_axis_and_pinch_gradient_shapes():
    assert only_problem(doc({**TWIST, "axis": [0, 0, 0]})) == \
        "strokes[0].axis: must not be the zero vector"
    assert only_problem(doc({**PINCH, "gradient": [[1, 0, 0], [0, 1, 0]]})).startswith(
        "strokes[0].gradient: must be a 3x3 matrix, got shape (2, 3)")
    assert only_problem(doc({**PINCH, "gradient": [[1, 0, 0], [0, 1], [0, 0, 1]]})).startswith(
        "strokes[0].gradient: must be a 3x3 matrix of numbers")
    assert only_problem(doc({**SCALE, "factor": 0})) == \
        "strokes[0].factor: must be a positive number, got 0"


def test_missing_required_keys():
    d = {k: v for k, v in GRAB.items() if k != "move"}
    assert only_problem(doc(d)) == "strokes[0].move: missing (required by brush 'grab')"
    p = problems_of(doc({"brush": "twist"}))
    assert p == [f"strokes[0].{k}: missing (required by brush 'twist')"
                 for k in ("center", "radius", "axis", "degrees")]
    assert only_problem(doc({"center": [0, 0, 0]})).startswith(
        "strokes[0].brush: missing; known brushes: grab, handles, pinch, scale, twist")


def test_unknown_brush_lists_known_ones():
    p = only_problem(doc({**GRAB, "brush": "smudge"}))
    assert p.startswith("strokes[0].brush: unknown brush 'smudge'; known brushes: ")
    assert {"grab", "pinch", "scale", "twist"} <= set(p.split("known brushes: ")[1].split(", "))
    assert only_problem(doc({**GRAB, "brush": 3})) == "strokes[0].brush: must be a brush name, got 3"


def test_format_tag():
    assert only_problem(doc(GRAB, format="pliant-pose")) == (
        "format: must be 'pliant-recipe', got 'pliant-pose'; this is not a pliant recipe")
    d = doc(GRAB)
    del d["format"]
    assert only_problem(d).startswith("format: missing")
    assert only_problem([GRAB]).startswith("recipe: must be a JSON object")


def test_version_with_hint():
    p = only_problem(doc(GRAB, version=2))
    assert p.startswith("version: this pliant reads version 1, the recipe says 2; ")
    assert "re-save the recipe as version 1" in p
    assert only_problem(doc(GRAB, version="1")).startswith(
        "version: this pliant reads version 1, the recipe says '1'")
    d = doc(GRAB)
    del d["version"]
    assert only_problem(d).startswith("version: missing")


def test_top_level_keys():
    assert only_problem(doc(GRAB, author="workshop")).startswith("author: unknown key")
    d = doc()
    del d["strokes"]
    assert only_problem(d).startswith("strokes: missing")
    assert only_problem(doc(strokes={"0": GRAB})).startswith("strokes: must be a list")
    d = doc(GRAB)
    d["strokes"].append(5)
    assert only_problem(d).startswith('strokes[1]: must be an object with a "brush" key')
    assert len(parse_recipe(doc())) == 0  # an empty recipe is valid


def test_duplicate_keys_in_the_file(tmp_path):
    text = json.dumps(doc(GRAB))[:-3] + ', "radius": 0.5}]}'  # a second "radius" in stroke 0
    with pytest.raises(RecipeError) as info:
        load_recipe(write(tmp_path, text))
    assert info.value.problems == ["strokes[0].radius: given more than once"]


def test_constructor_errors_pass_through_with_the_stroke():
    # The brush class validates its own ranges; its message starts with the parameter name.
    with pytest.raises(ValueError) as direct:
        brushes.Grab([0, 1, 0], 0.3, [0.1, 0, 0], falloff="no-such-falloff")
    p = only_problem(doc(GRAB, {**GRAB, "falloff": "no-such-falloff"}))
    assert p == f"strokes[1].{direct.value}"
    assert str(direct.value).startswith("falloff")


def test_every_problem_is_reported_and_the_file_named(tmp_path):
    text = json.dumps(doc({**GRAB, "radius": -1}, {**TWIST, "axis": [0, 1]}, {"brush": "smudge"}))
    path = write(tmp_path, text)
    with pytest.raises(RecipeError) as info:
        load_recipe(path)
    lines = str(info.value).splitlines()
    assert len(lines) == 3
    assert all(line.startswith(f"{path}: strokes[") for line in lines)
    assert [line.split(": ")[1].split(".")[0] for line in lines] == \
        ["strokes[0]", "strokes[1]", "strokes[2]"]


def test_not_utf8(tmp_path):
    path = tmp_path / "r.json"
    path.write_bytes(b'{"format": "pliant-recipe", "x": "\xff"}')
    with pytest.raises(RecipeError, match="not UTF-8 text"):
        load_recipe(path)


def test_recipe_error_is_a_value_error():
    assert issubclass(RecipeError, ValueError)


def test_stroke_built_in_code_is_validated_too():
    with pytest.raises(RecipeError, match=r"^stroke\.radius: must be a positive number"):
        Stroke("grab", {"center": [0, 0, 0], "radius": -1.0, "move": [0, 0, 0]})
    with pytest.raises(RecipeError, match=r"^stroke\.brush: unknown brush 'smudge'"):
        Stroke("smudge", {})
    with pytest.raises(ValueError, match=r"^strokes\[1\]: must be a Stroke"):
        Recipe([parse_stroke(GRAB), GRAB])
    # numpy values become plain JSON-ready values
    s = Stroke("grab", {"center": np.array([0.0, 1, 0]), "radius": np.float64(0.3),
                        "move": np.zeros(3)}, pins=np.ones((1, 3)))
    assert s.params["center"] == [0.0, 1.0, 0.0] and type(s.params["radius"]) is float
    assert s.pins == [[1.0, 1.0, 1.0]]


# --- masks need the mesh: checked at apply time -----------------------------------------------


def test_mask_problems_at_apply(points):
    r = parse_recipe(doc(GRAB, {**TWIST, "mask": {"weights": [1.0, 0.5]}}))
    with pytest.raises(RecipeError, match=r"^strokes\[1\]\.mask\.weights: has 2 weights but the "
                                          r"mesh has 300 vertices"):
        r.apply(points)
    r = parse_recipe(doc({**GRAB, "mask": {"group": "tail"}}))
    with pytest.raises(RecipeError, match=r"^strokes\[0\]\.mask\.group: the mesh has no named groups"):
        r.apply(points)
    with pytest.raises(RecipeError, match=r"the mesh has no group 'tail'; its groups: arm, head"):
        r.apply(points, groups={"head": [0, 1], "arm": [2]})
    with pytest.raises(ValueError, match=r"^points: must have shape \(n, 3\), got \(4,\)"):
        r.apply(np.zeros(4))


def test_group_mask_weights(points):
    s = parse_stroke({**GRAB, "mask": {"group": "g"}})
    n = len(points)
    # hand case: indices 0 and 2 are the group
    np.testing.assert_array_equal(s.weights(4, groups={"g": [0, 2]}), [1.0, 0.0, 1.0, 0.0])
    np.testing.assert_array_equal(s.weights(3, groups={"g": np.array([False, True, True])}),
                                  [0.0, 1.0, 1.0])
    with pytest.raises(ValueError, match=r"vertex indices must lie in \[0, 4\)"):
        s.weights(4, groups={"g": [4]})
    # the group mask is exactly the API call with those weights
    idx = np.arange(0, n, 3)
    w = np.zeros(n)
    w[idx] = 1.0
    want = brushes.Grab([0, 1, 0], 0.3, [0.1, 0, 0], poisson=0.5, falloff="wide").apply(
        points, flow=True, pins=None, mask=w)
    np.testing.assert_array_equal(s.apply(points, groups={"g": idx}), want)


# --- determinism: round trips and replay -------------------------------------------------------


def full_recipe():
    return parse_recipe(doc(
        GRAB,
        {**TWIST, "mirror": {"normal": [1, 0, 0], "point": [0, 0, 0]}},
        {**SCALE, "flow": False, "pins": [[0.0, 0.6, 0.0]]},
        {**PINCH, "mask": {"weights": list(np.linspace(0, 1, 300))}},
        {**GRAB, "move": [0, 0.05, 0.02], "mask": {"group": "upper"}},
    ))


def test_save_load_round_trip(tmp_path):
    r = full_recipe()
    path = tmp_path / "pose.json"
    save_recipe(r, path)
    again = load_recipe(path)
    assert again == r
    assert recipe_to_dict(again) == recipe_to_dict(r)
    # the dict is the stroke dicts as written, defaults left out
    d = recipe_to_dict(r)
    assert d["strokes"][0] == {"brush": "grab", "center": [0.0, 1.0, 0.0], "radius": 0.3,
                               "move": [0.1, 0.0, 0.0], "poisson": 0.5, "falloff": "wide"}
    assert d["strokes"][2]["flow"] is False and "flow" not in d["strokes"][1]
    # saving again writes the same bytes; Python's json reads the text back to the same dict
    first = path.read_bytes()
    save_recipe(again, path)
    assert path.read_bytes() == first
    assert json.loads(first) == d
    assert [p for p in os.listdir(tmp_path)] == ["pose.json"]  # no temporary left behind


def test_floats_survive_exactly(tmp_path):
    # float repr is shortest-round-trip (Python language reference): every float64 comes back
    values = [0.1 + 0.2, 1 / 3, 2 / 3, 1e-17, -2.5e-10]
    r = parse_recipe(doc({**GRAB, "center": values[:3], "move": values[2:]}))
    path = tmp_path / "r.json"
    save_recipe(r, path)
    s = load_recipe(path).strokes[0]
    assert s.params["center"] == values[:3] and s.params["move"] == values[2:]


def test_failed_save_keeps_the_old_file(tmp_path, monkeypatch):
    path = tmp_path / "pose.json"
    save_recipe(parse_recipe(doc(GRAB)), path)
    before = path.read_bytes()
    import brushes.recipe as module

    def boom(recipe):
        raise RuntimeError("disk trouble")

    monkeypatch.setattr(module, "dumps_recipe", boom)
    with pytest.raises(RuntimeError):
        save_recipe(parse_recipe(doc(TWIST)), path)
    assert path.read_bytes() == before


def test_replay_is_the_api_stroke_by_stroke(points):
    r = full_recipe()
    groups = {"upper": np.nonzero(points[:, 1] > 1.0)[0]}
    got = r.apply(points, groups=groups)

    # the same strokes through the engine API by hand
    p = points.copy()
    p = brushes.Grab([0, 1, 0], 0.3, [0.1, 0, 0], poisson=0.5, falloff="wide").apply(
        p, flow=True, pins=None, mask=None)
    twist = brushes.mirror(brushes.Twist([0, 1.2, 0], 0.4, [0, 1, 0], 30), [1, 0, 0], [0, 0, 0])
    p = twist.apply(p, flow=True, pins=None, mask=None)
    p = brushes.Scale([0.3, 0.8, 0], 0.4, 1.2, poisson=0.3).apply(
        p, flow=False, pins=np.array([[0.0, 0.6, 0.0]]), mask=None)
    p = brushes.Pinch([0.2, 1, 0], 0.3, [[0.1, 0, 0], [0, -0.05, 0], [0, 0, -0.05]]).apply(
        p, flow=True, pins=None, mask=np.linspace(0, 1, 300))
    w = np.zeros(len(points))
    w[groups["upper"]] = 1.0
    p = brushes.Grab([0, 1, 0], 0.3, [0, 0.05, 0.02], poisson=0.5, falloff="wide").apply(
        p, flow=True, pins=None, mask=w)

    assert np.array_equal(got, p)  # bitwise
    assert not np.array_equal(got, points)  # and the strokes did move something
    # replay does not touch its input
    assert np.array_equal(points, np.random.default_rng(11).uniform(
        [-0.6, 0.4, -0.5], [0.6, 1.6, 0.5], size=(300, 3)))


def test_replay_after_save_and_load_is_bitwise_equal(tmp_path, points):
    r = full_recipe()
    groups = {"upper": np.nonzero(points[:, 1] > 1.0)[0]}
    path = tmp_path / "r.json"
    save_recipe(r, path)
    assert np.array_equal(load_recipe(path).apply(points, groups=groups),
                          r.apply(points, groups=groups))


def test_apply_stroke_and_from_brush(points):
    b = brushes.Twist([0, 1.2, 0], 0.4, [0, 1, 0], 30)
    s = Stroke.from_brush(b)
    # params() gives every keyword, defaults included
    assert s == parse_stroke({**TWIST, "poisson": 0.5, "falloff": "wide"})
    m = Stroke.from_brush(brushes.mirror(b, [2, 0, 0], [0.1, 0, 0]), flow=False)
    assert m == parse_stroke({**TWIST, "poisson": 0.5, "falloff": "wide", "flow": False,
                              "mirror": {"normal": [2, 0, 0], "point": [0.1, 0, 0]}})
    want = b.apply(points, flow=True, pins=None, mask=None)
    assert np.array_equal(apply_stroke(points, TWIST), want)
    assert np.array_equal(apply_stroke(points, s), want)


def test_recipe_pickles():
    # batch runs send the recipe to worker processes
    r = full_recipe()
    assert pickle.loads(pickle.dumps(r)) == r


def test_dumps_is_one_stroke_per_line():
    text = dumps_recipe(parse_recipe(doc(GRAB, TWIST)))
    lines = text.splitlines()
    assert lines[:4] == ["{", '  "format": "pliant-recipe",', '  "version": 1,', '  "strokes": [']
    assert lines[4].startswith('    {"brush": "grab"') and lines[5].startswith('    {"brush": "twist"')
    assert lines[6:] == ["  ]", "}"]
    assert dumps_recipe(Recipe(())).splitlines()[3] == '  "strokes": []'
