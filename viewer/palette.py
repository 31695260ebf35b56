"""The viewer's colours and light set-up: warm clay on a slate ground.

Every colour is RGB, three floats in [0, 1], written to the framebuffer as is (no gamma
step). The renderer and the PNG snapshot both read this module, so a picture from
``pliant snapshot`` matches the window.
Nothing here touches OpenGL.

The look, in words: the model is unglazed workshop clay (a warm, slightly red earth tone)
lit by a warm key lamp from the upper left and a cool fill bounced off slate from the
lower right, on a flat slate-grey ground. Edits are shown as a ramp from cool slate
through sand to ember, starting pale enough to stand off the ground; held (masked) areas
take on a moss-green tint; faces turned over take a violet warning tint; pins are brass discs
rimmed in near-black.
"""

import numpy as np

__all__ = [
    "BACKGROUND", "CLAY", "CLAY_BACK", "KEY_COLOUR", "KEY_DIRECTION", "FILL_COLOUR",
    "FILL_DIRECTION", "AMBIENT_SKY", "AMBIENT_GROUND", "WRAP", "GLOSS", "SHEEN",
    "MASK_TINT", "FOLD_TINT", "PIN", "PIN_RIM", "HANDLE", "BRUSH_RING", "BRUSH_RING_MIRROR", "TEXT",
    "PANEL", "contrast_ratio",
    "RAMP", "ramp",
]

#: Flat slate ground behind the model.
BACKGROUND = (0.176, 0.196, 0.224)
#: Front-face base colour: unglazed clay.
CLAY = (0.780, 0.540, 0.420)
#: Back faces (seen through holes) are a darker, greyer clay so they read as "inside".
CLAY_BACK = (0.360, 0.300, 0.290)

#: Key lamp: warm, from the upper left and slightly in front (view space, towards the light).
KEY_COLOUR = (1.00, 0.93, 0.82)
KEY_DIRECTION = (-0.45, 0.70, 0.55)
#: Fill: cool bounce from the lower right.
FILL_COLOUR = (0.34, 0.40, 0.50)
FILL_DIRECTION = (0.60, -0.35, 0.45)
#: Hemisphere ambient: slate from above, warm floor from below (view-space up is +y).
AMBIENT_SKY = (0.20, 0.22, 0.26)
AMBIENT_GROUND = (0.16, 0.12, 0.10)
#: Diffuse wrap in [0, 1): how far past the terminator the key light still reaches.
WRAP = 0.35
#: Specular: a broad, dull highlight (clay is not glossy). Exponent and strength.
GLOSS = 18.0
SHEEN = 0.10

#: Colour that masked (held) vertices are tinted towards, in proportion to their hold.
MASK_TINT = (0.330, 0.470, 0.300)
#: Colour that vertices of faces turned over (folded) are tinted towards.
FOLD_TINT = (0.620, 0.300, 0.900)
#: Pin markers: a brass disc on a near-black rim.
PIN = (0.950, 0.780, 0.300)
PIN_RIM = (0.060, 0.060, 0.070)
#: Handle markers: a teal disc on the same dark rim (a pin holds, a handle is dragged).
HANDLE = (0.300, 0.800, 0.760)
#: The brush outline at its radius, and its mirrored twin.
BRUSH_RING = (0.960, 0.930, 0.850)
BRUSH_RING_MIRROR = (0.600, 0.640, 0.700)
#: Text overlay and help panel backing (the panel is drawn with alpha 0.8).
TEXT = (0.930, 0.910, 0.870)
PANEL = (0.110, 0.120, 0.140)

#: Displacement-magnitude ramp: (position in [0, 1], colour) stops, pale slate -> sand -> ember.
#: The unmoved end is pale so that it stands off the slate ground (contrast ratio above 4.5,
#: see :func:`contrast_ratio`).
RAMP = (
    (0.00, (0.600, 0.690, 0.760)),
    (0.45, (0.760, 0.780, 0.640)),
    (0.70, (0.930, 0.780, 0.480)),
    (1.00, (0.880, 0.300, 0.150)),
)


def contrast_ratio(a, b):
    """Contrast ratio of two sRGB colours (three floats in [0, 1]), from 1 to 21.

    The W3C formula (WCAG 2.1, "contrast ratio" and "relative luminance"):
    ``(L1 + 0.05) / (L2 + 0.05)`` with ``L = 0.2126 R + 0.7152 G + 0.0722 B`` of the
    linearised channels (``c / 12.92`` up to 0.04045, else ``((c + 0.055) / 1.055) ** 2.4``).
    """
    def luminance(colour):
        c = np.asarray(colour, dtype=np.float64)
        linear = np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)
        return float(linear @ [0.2126, 0.7152, 0.0722])

    hi, lo = sorted((luminance(a), luminance(b)), reverse=True)
    return (hi + 0.05) / (lo + 0.05)


def ramp(values):
    """Colour of each normalised displacement magnitude on :data:`RAMP`.

    Parameters
    ----------
    values : (n,) float
        Normalised magnitudes; clipped to [0, 1].

    Returns
    -------
    (n, 3) float64
        RGB, piecewise-linear between the stops.
    """
    values = np.asanyarray(values, dtype=np.float64)
    if values.ndim != 1:
        raise ValueError(f"values: must have shape (n,), got {values.shape}")
    t = np.clip(values, 0.0, 1.0)
    stops = np.array([s for s, _ in RAMP])
    colours = np.array([c for _, c in RAMP])
    return np.stack([np.interp(t, stops, colours[:, k]) for k in range(3)], axis=1)


def glsl_constants():
    """GLSL ``const`` declarations of the palette, for pasting into a shader source.

    Returns
    -------
    str
        One ``const vec3``/``const float`` line per entry the mesh shader uses, plus the ramp
        as ``RAMP_STOPS`` and the arrays ``RAMP_AT`` and ``RAMP_COLOUR``.
    """
    def vec3(name, c):
        return f"const vec3 {name} = vec3({c[0]:.4f}, {c[1]:.4f}, {c[2]:.4f});"

    key = np.asarray(KEY_DIRECTION) / np.linalg.norm(KEY_DIRECTION)
    fill = np.asarray(FILL_DIRECTION) / np.linalg.norm(FILL_DIRECTION)
    lines = [
        vec3("CLAY", CLAY), vec3("CLAY_BACK", CLAY_BACK),
        vec3("KEY_COLOUR", KEY_COLOUR), vec3("KEY_DIRECTION", key),
        vec3("FILL_COLOUR", FILL_COLOUR), vec3("FILL_DIRECTION", fill),
        vec3("AMBIENT_SKY", AMBIENT_SKY), vec3("AMBIENT_GROUND", AMBIENT_GROUND),
        vec3("MASK_TINT", MASK_TINT), vec3("FOLD_TINT", FOLD_TINT),
        f"const float WRAP = {WRAP:.4f};",
        f"const float GLOSS = {GLOSS:.4f};",
        f"const float SHEEN = {SHEEN:.4f};",
        f"const int RAMP_STOPS = {len(RAMP)};",
        f"const float RAMP_AT[{len(RAMP)}] = float[{len(RAMP)}](" + ", ".join(
            f"{s:.4f}" for s, _ in RAMP) + ");",
        f"const vec3 RAMP_COLOUR[{len(RAMP)}] = vec3[{len(RAMP)}](" + ", ".join(
            f"vec3({c[0]:.4f}, {c[1]:.4f}, {c[2]:.4f})" for _, c in RAMP) + ");",
    ]
    return "\n".join(lines)
