"""brushes.batch: planning outputs, one-mesh tasks, and the local and Dask runners.

The posed positions a batch must write are computed in the test by calling the engine API
(``brushes.Grab(...).apply``) directly; files are written and read back with trimesh, an
independent OBJ reader and writer.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np
import pytest
import trimesh

from brushes.batch import (BatchError, ClusterUnavailable, Outcome, describe, interrupted, plan,
                           pose_file, run_batch)

STROKE = {"brush": "grab", "center": [0.3, 0.5, 0.0], "radius": 0.7, "move": [0.0, 0.2, 0.1]}


def read_obj(path):
    mesh = trimesh.load(path, file_type="obj", process=False, maintain_order=True, force="mesh")
    return np.asarray(mesh.vertices)


@pytest.fixture(scope="module")
def assets(tmp_path_factory):
    """Four small meshes (trimesh primitives) and a one-stroke recipe file."""
    d = tmp_path_factory.mktemp("batch")
    meshes = {"ball.obj": trimesh.creation.icosphere(subdivisions=2),
              "box.obj": trimesh.creation.box(extents=(1.0, 1.5, 0.8)),
              "can.obj": trimesh.creation.cylinder(radius=0.5, height=1.2, sections=24),
              "cone.obj": trimesh.creation.cone(radius=0.6, height=1.0, sections=20)}
    paths = []
    for name, mesh in meshes.items():
        (d / name).write_text(trimesh.exchange.obj.export_obj(mesh, include_normals=False))
        paths.append(d / name)
    recipe = d / "pose.json"
    recipe.write_text(json.dumps({"format": "pliant-recipe", "version": 1, "strokes": [STROKE]}))
    return {"dir": d, "paths": paths, "recipe": recipe}


def expected(path):
    """The stroke applied through the engine API to the mesh as trimesh reads it."""
    import brushes

    brush = brushes.Grab(STROKE["center"], STROKE["radius"], STROKE["move"])
    return brush.apply(read_obj(path))


# --------------------------------------------------------------------------- plan

def test_plan_names_outputs_after_inputs(tmp_path):
    tasks = plan(["a/x.obj", "b/y.ply"], tmp_path / "out")
    assert [Path(d).name for _, d in tasks] == ["x.obj", "y.ply"]
    assert all(Path(s).is_absolute() and Path(d).parent == tmp_path / "out" for s, d in tasks)


def test_plan_refuses_clashing_names_and_writing_over_inputs(tmp_path):
    with pytest.raises(BatchError, match="distinct file names"):
        plan(["a/x.obj", "b/x.obj"], tmp_path)
    src = tmp_path / "x.obj"
    src.write_text("v 0 0 0\n")
    with pytest.raises(BatchError, match="--force"):
        plan([src], tmp_path)
    assert plan([src], tmp_path, force=True) == [(str(src), str(src))]
    with pytest.raises(BatchError, match="no input"):
        plan([], tmp_path)


def test_describe_gives_one_line():
    assert describe(FileNotFoundError(2, "No such file or directory", "m.obj")) == \
        "m.obj: No such file or directory"
    assert describe(ValueError("first\n  second\n")) == "first; second"
    assert describe(RuntimeError("odd")) == "RuntimeError: odd"


def test_an_interrupt_inside_compiled_code_is_still_an_interrupt():
    # CPython turns an exception pending when a C function returns normally into
    # "SystemError: ... returned a result with an exception set", chained to the original
    # (seen with Ctrl-C during a numba kernel)
    try:
        try:
            raise KeyboardInterrupt
        except KeyboardInterrupt as exc:
            raise SystemError("returned a result with an exception set") from exc
    except SystemError as err:
        assert interrupted(err)
    assert not interrupted(ValueError("bad mesh"))
    assert interrupted(KeyboardInterrupt())


# --------------------------------------------------------------------------- one task

def test_pose_file_writes_the_api_result(assets, tmp_path):
    src = assets["paths"][0]
    outcome = pose_file(str(assets["recipe"]), str(src), str(tmp_path / src.name))
    assert outcome.ok and outcome.seconds > 0
    np.testing.assert_allclose(read_obj(tmp_path / src.name), expected(src), rtol=0, atol=1e-9)


def test_pose_file_reports_a_bad_mesh_without_raising(assets, tmp_path):
    bad = tmp_path / "bad.obj"
    bad.write_bytes(b"v 0 0 0\nv 1 0\nf 1 2 3\n")
    outcome = pose_file(str(assets["recipe"]), str(bad), str(tmp_path / "out.obj"))
    assert not outcome.ok and "bad.obj" in outcome.error and "\n" not in outcome.error
    assert not (tmp_path / "out.obj").exists()
    missing = pose_file(str(assets["recipe"]), str(tmp_path / "none.obj"), str(tmp_path / "o.obj"))
    assert not missing.ok and "none.obj" in missing.error


# --------------------------------------------------------------------------- runners

def test_run_batch_on_two_processes_keeps_task_order(assets, tmp_path):
    from brushes.recipe import load_recipe

    bad = tmp_path / "bad.obj"
    bad.write_text("not a mesh\n")
    inputs = [*assets["paths"][:2], bad, *assets["paths"][2:]]
    tasks = plan(inputs, tmp_path / "out")
    (tmp_path / "out").mkdir()
    seen = []
    outcomes = run_batch(load_recipe(assets["recipe"]), tasks, jobs=2, on_done=seen.append)
    assert [o.source for o in outcomes] == [s for s, _ in tasks]
    assert sorted(o.source for o in seen) == sorted(s for s, _ in tasks)
    assert [o.ok for o in outcomes] == [True, True, False, True, True]
    for src in assets["paths"]:
        np.testing.assert_allclose(read_obj(tmp_path / "out" / src.name), expected(src),
                                   rtol=0, atol=1e-9)


def test_run_batch_in_process_matches_two_processes(assets, tmp_path):
    one, two = tmp_path / "one", tmp_path / "two"
    one.mkdir(), two.mkdir()
    run_batch(assets["recipe"], plan(assets["paths"], one), jobs=1)
    run_batch(assets["recipe"], plan(assets["paths"], two), jobs=2)
    for src in assets["paths"]:
        assert (one / src.name).read_bytes() == (two / src.name).read_bytes()


def test_run_batch_on_a_dask_cluster_of_processes(assets, tmp_path):
    distributed = pytest.importorskip("distributed", reason="dask.distributed not installed")
    from brushes.recipe import load_recipe

    (tmp_path / "out").mkdir()
    tasks = plan(assets["paths"], tmp_path / "out")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  host="127.0.0.1", dashboard_address=None) as cluster:
        assert cluster.scheduler_address.startswith("tcp://127.0.0.1:")   # loopback only
        outcomes = run_batch(load_recipe(assets["recipe"]), tasks,
                             scheduler=cluster.scheduler_address)
    assert all(isinstance(o, Outcome) and o.ok for o in outcomes)
    for src in assets["paths"]:
        np.testing.assert_allclose(read_obj(tmp_path / "out" / src.name), expected(src),
                                   rtol=0, atol=1e-9)


def test_run_batch_without_dask_names_the_extra(assets, tmp_path, monkeypatch):
    monkeypatch.setitem(sys.modules, "distributed", None)     # import fails as if absent
    with pytest.raises(ClusterUnavailable, match=r"pip install pliant\[cluster\]"):
        run_batch(assets["recipe"], plan(assets["paths"], tmp_path), scheduler="tcp://127.0.0.1:1")


def test_run_batch_rejects_bad_jobs(assets, tmp_path):
    with pytest.raises(BatchError, match="--jobs"):
        run_batch(assets["recipe"], plan(assets["paths"], tmp_path), jobs=0)
