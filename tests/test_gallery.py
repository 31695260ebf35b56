"""viewer.gallery: the falloff plot (in process, Pillow only) and the mascot pictures (headless
pyglet in a fresh subprocess, as in test_snapshot.py, so this process never imports pyglet)."""

import math
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from viewer import gallery, palette

ROOT = Path(__file__).resolve().parents[1]
SIZE = (960, 420)


def _rgb(colour):
    return np.round(np.array(colour) * 255).astype(int)


def _near(image, colour, tol=12):
    """(h, w) bool: pixels within ``tol`` of ``colour`` (RGB floats in [0, 1]) on every channel."""
    return np.abs(image.astype(int) - _rgb(colour)).max(axis=2) <= tol


def _inside(mask, box):
    left, top, right, bottom = (int(round(v)) for v in box)
    return mask[top + 2:bottom - 1, left + 2:right - 1]


def test_profiles_follow_the_regularized_kelvinlet():
    # de Goes & James 2017, eq. 9, worked by hand for radius eps = 1 and Poisson's ratio 0.5
    # (b = a / 2), normalised by the value at the centre (a): with s = sqrt(r^2 + 1),
    # across the move u / move = (1/s + 1/s^3) / 2; along it (1/s + (1 + r^2)/s^3) / 2 = 1/s.
    r = np.linspace(0.0, 5.0, 51)
    s = np.sqrt(r**2 + 1.0)
    across = gallery.falloff_profiles(r, direction="across", falloffs=("wide",))["wide"]
    along = gallery.falloff_profiles(r, direction="along", falloffs=("wide",))["wide"]
    np.testing.assert_allclose(across, 0.5 * (1 / s + 1 / s**3), rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(along, 1 / s, rtol=1e-12, atol=1e-15)


def test_profiles_reject_bad_input():
    with pytest.raises(ValueError, match="^direction"):
        gallery.falloff_profiles([0.0, 1.0], direction="sideways")
    with pytest.raises(ValueError, match="^distances"):
        gallery.falloff_profiles(np.zeros((2, 2)))
    with pytest.raises(ValueError, match="^path"):
        gallery.plot_falloffs("plot.jpg")


@pytest.fixture(scope="module")
def plot(tmp_path_factory):
    path = tmp_path_factory.mktemp("gallery") / "falloffs.png"
    assert gallery.plot_falloffs(path, size=SIZE) == os.fspath(path)
    with Image.open(path) as opened:
        image = np.asarray(opened.convert("RGB"))
    return path, image


def test_plot_is_a_small_png_of_the_asked_size(plot):
    path, image = plot
    with Image.open(path) as opened:
        assert opened.format == "PNG"
        assert opened.size == SIZE
    assert image.shape == (SIZE[1], SIZE[0], 3)
    assert path.stat().st_size < 200_000
    # The ground outside the panels is the palette's background.
    np.testing.assert_array_equal(image[2, 2], _rgb(palette.BACKGROUND))
    assert not list(path.parent.glob(".*.tmp"))  # atomic write left no temporary behind


def test_every_curve_is_drawn_in_both_panels(plot):
    _, image = plot
    linear, loglog = gallery.falloff_panels(SIZE)
    for name, colour in gallery.FALLOFF_COLOURS.items():
        mask = _near(image, colour)
        # A 3-pixel curve across a panel covers far more than its 30-pixel legend swatch.
        assert _inside(mask, linear.box).sum() > 600, name
        assert _inside(mask, loglog.box).sum() > 600, name


def _curve_rows(image, panel, colour, x):
    """Rows of the pixels of ``colour`` in the pixel column at data abscissa ``x``."""
    column = int(round(float(panel.to_pixel(x, panel.y_range[0])[0])))
    rows = np.nonzero(_near(image[:, column:column + 1], colour)[:, 0])[0]
    left, top, right, bottom = panel.box
    return rows[(rows > top) & (rows < bottom)]


def test_wide_curve_passes_where_the_formula_puts_it(plot):
    _, image = plot
    linear, loglog = gallery.falloff_panels(SIZE)
    colour = gallery.FALLOFF_COLOURS["wide"]
    for r in (1.0, 2.0, 4.0):
        # Across the move: (1/s + 1/s^3) / 2, s = sqrt(r^2 + 1) (de Goes & James 2017, eq. 9).
        s = math.sqrt(r * r + 1.0)
        expected = float(linear.to_pixel(r, 0.5 * (1 / s + 1 / s**3))[1])
        rows = _curve_rows(image, linear, colour, r)
        assert rows.size and np.min(np.abs(rows - expected)) <= 2, (r, expected, rows)
    for r in (3.0, 30.0):
        # Along the move: 1/s, the same equation.
        expected = float(loglog.to_pixel(r, 1 / math.sqrt(r * r + 1.0))[1])
        rows = _curve_rows(image, loglog, colour, r)
        assert rows.size and np.min(np.abs(rows - expected)) <= 2, (r, expected, rows)


@pytest.mark.parametrize("name, slope", [("wide", -1.0), ("medium", -3.0), ("tight", -5.0)])
def test_far_field_slopes_read_off_the_picture(plot, name, slope):
    # The one-, two- and three-radius falloffs decay as 1/r, 1/r^3 and 1/r^5 far from the
    # centre (de Goes & James 2017, sec. 5; the powers as stated there, quoted from memory).
    _, image = plot
    _, loglog = gallery.falloff_panels(SIZE)
    colour = gallery.FALLOFF_COLOURS[name]
    values = []
    for r in (20.0, 80.0):
        rows = _curve_rows(image, loglog, colour, r)
        assert rows.size, (name, r)
        values.append(loglog.from_pixel(0.0, np.median(rows))[1])
    measured = math.log(values[1] / values[0]) / math.log(80.0 / 20.0)
    assert abs(measured - slope) < 0.15, measured


def test_unknown_job_is_refused_before_any_work(tmp_path, capsys):
    assert gallery.main(["--out", os.fspath(tmp_path / "img"), "--only", "falloffs,portrait"]) == 2
    assert "portrait" in capsys.readouterr().err
    assert not (tmp_path / "img").exists()


def test_twist_pictures_render_headless(tmp_path):
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    result = subprocess.run([sys.executable, "-m", "viewer.gallery", "--out", str(tmp_path),
                             "--only", "twist", "--size", "96"], cwd=ROOT, env=env,
                            capture_output=True, text=True, timeout=1800)  # a hang guard, not a speed limit
    assert result.returncode == 0, result.stderr
    images = {}
    for name in gallery.JOBS["twist"]:
        assert f"{name}: " in result.stdout
        with Image.open(tmp_path / name) as opened:
            assert opened.size == (96, 96)
            images[name] = np.asarray(opened.convert("RGB"))
    covered = {}
    for name, image in images.items():
        for corner in (image[0, 0], image[-1, 0], image[-1, -1]):
            np.testing.assert_array_equal(corner, _rgb(palette.BACKGROUND))
        covered[name] = (np.abs(image.astype(int) - _rgb(palette.BACKGROUND)).max(axis=2) > 2).sum()
        assert covered[name] > 0.1 * 96 * 96, name  # the head fills a good part of the frame
    # Hand computation: added in one step, a twist of theta = pi/2 is I + theta [axis]x at its
    # centre, which stretches the plane seen from above by sqrt(1 + theta^2) = 1.86 in every
    # direction; integrated as a flow it is a rotation there, which keeps areas.
    rest = covered["twist-rest.png"]
    assert covered["twist-linear.png"] > 1.3 * rest
    assert abs(covered["twist-flow.png"] - rest) < 0.1 * rest
