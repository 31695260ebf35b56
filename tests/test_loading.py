"""viewer.loading: opening a mesh in stages, with progress for the window and the terminal."""

import io

import numpy as np
import trimesh

from viewer.loading import STAGES, TerminalProgress, load_session


def test_stages_report_rising_progress_to_ready(tmp_path):
    path = tmp_path / "ball.obj"
    mesh = trimesh.creation.icosphere(subdivisions=3)
    mesh.export(path)
    seen = []
    session, field = load_session(path, size=(320, 240), threaded=False,
                                  progress=lambda f, text: seen.append((f, text)))
    try:
        fractions = [f for f, _ in seen]
        assert fractions == sorted(fractions) and fractions[0] == 0.0 and fractions[-1] == 1.0
        assert [t for _, t in seen] == [text for _, _, text in STAGES] + ["ready"]
        assert abs(sum(share for _, share, _ in STAGES) - 1.0) < 1e-12
        # The session is the mesh read from the file (reference: trimesh's own reading), and
        # the normals handed over are those of its shown shape: area-weighted sums whose
        # directions match trimesh's area-weighted vertex normals.
        loaded = trimesh.load(path, process=False)
        np.testing.assert_allclose(session.rest, loaded.vertices, atol=1e-6)
        reference = trimesh.geometry.mean_vertex_normals(
            len(loaded.vertices), loaded.faces, loaded.face_normals * loaded.area_faces[:, None])
        unit = field.normals / np.linalg.norm(field.normals, axis=1, keepdims=True)
        np.testing.assert_allclose(unit, reference, atol=1e-5)
    finally:
        session.close()


def test_terminal_bar_lines():
    out = io.StringIO()
    bar = TerminalProgress(out, width=10)
    bar(0.0, "reading the mesh")
    bar(0.5, "indexing the surface for picking")
    bar(1.0, "ready")
    assert out.getvalue().splitlines() == [
        "pliant view: [----------]   0%  reading the mesh",
        "pliant view: [#####-----]  50%  indexing the surface for picking",
        "pliant view: [##########] 100%  ready",
    ]


def test_terminal_bar_redraws_in_place_on_a_terminal():
    class Tty(io.StringIO):
        def isatty(self):
            return True

    out = Tty()
    bar = TerminalProgress(out, width=4)
    bar(0.25, "a")
    bar(1.0, "ready")
    text = out.getvalue()
    assert text.count("\r") == 2 and text.endswith("\n") and text.count("\n") == 1
    assert "[#---]  25%  a" in text and "[####] 100%  ready" in text
