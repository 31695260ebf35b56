"""Tests for brushes.formats (the package face): format dispatch and one-line errors naming the file."""


import pytest

from brushes.formats import MeshError, load_mesh


@pytest.mark.parametrize("ext", ["obj", "ply", "stl", "off", "glb", "gltf"])
@pytest.mark.parametrize("content", [b"", b"\x00\xff\x13garbage\x01" * 40, b"hello world\n"])
def test_garbage_raises_mesh_error_naming_file(tmp_path, ext, content):
    p = tmp_path / f"bad.{ext}"
    p.write_bytes(content)
    with pytest.raises(MeshError) as info:
        load_mesh(p)
    msg = str(info.value)
    assert str(p) in msg and "\n" not in msg


def test_missing_folder_and_unknown_extension(tmp_path):
    with pytest.raises(MeshError, match="no such file"):
        load_mesh(tmp_path / "none.obj")
    (tmp_path / "dir.obj").mkdir()
    with pytest.raises(MeshError, match="folder"):
        load_mesh(tmp_path / "dir.obj")
    with pytest.raises(MeshError, match="unknown mesh format"):
        load_mesh(tmp_path / "x.fbx")
