"""Every `kinemark` command a study uses, run through the real argument parser on a small
project: the wiring between the command line and core (each core operation has its own
tests; these catch a command that no longer reaches it, or prints the wrong thing)."""
from __future__ import annotations

import json
import os
import shutil
from pathlib import Path

import pytest

from conftest import write_video
from kinemark.core.cli import main

BUNDLED = Path(__file__).resolve().parents[1] / "assets" / "models" / "pose_landmark_full.onnx"


def run(*args):
    return main([str(a) for a in args])


@pytest.fixture
def proj(tmp_path, capsys):
    root = tmp_path / "p"
    assert run("new", root) == 0
    for i, code in enumerate(("QB-01", "QB-02")):
        v = write_video(tmp_path / f"v{i}.mp4", n_frames=20, seed=i)
        assert run("add", root, v, "--participant", code, "--count", "3") == 0
    capsys.readouterr()
    return root


@pytest.mark.skipif(not BUNDLED.is_file(), reason="bundled model not present")
def test_propose_rank_and_weights(proj, capsys):
    assert run("propose", proj) == 0
    out = capsys.readouterr().out
    assert "proposed 6 frame(s)" in out and "0 already proposed" in out
    workers = min(2, os.cpu_count() or 1)
    assert run("propose", proj, "--workers", workers, "--frames", "all") == 0
    assert "proposed 0 frame(s)" in capsys.readouterr().out
    assert run("rank", proj, "--batch", "4") == 0
    lines = [ln for ln in capsys.readouterr().out.splitlines() if ln.strip()]
    assert len(lines) == 4 and all("score" in ln for ln in lines)
    assert run("rank", proj, "--batch", "2", "--set-weights", '{"uncertainty": 2}') == 0
    out = capsys.readouterr().out
    assert '"uncertainty": 2.0' in out and "note:" not in out
    assert run("rank", proj, "--batch", "2", "--set-weights", '{"novelty": 0}') == 0
    assert "note: with novelty 0 the queue picks only frames the model is unsure of" in capsys.readouterr().out
    assert run("rank", proj, "--batch", "2", "--set-weights", '{"novelty": 1}') == 0
    assert run("rank", proj, "--set-weights", '{"speed": 1}') == 2
    assert "unknown ranking weight 'speed'" in capsys.readouterr().err


def test_claim_release_and_adapt_without_labels(proj, capsys):
    assert run("claim", proj, "--batch", "2") == 0
    out = capsys.readouterr().out
    assert out.count("  frame ") == 2
    assert run("claim", proj, "--release") == 0
    assert "released 2 frame(s)" in capsys.readouterr().out
    assert run("adapt", proj) == 2          # a clear user error, not a crash
    assert "no accepted or submitted labels with a model proposal yet" in capsys.readouterr().err


def test_relink_a_moved_video(proj, tmp_path, capsys):
    moved = tmp_path / "elsewhere"
    moved.mkdir()
    shutil.move(tmp_path / "v0.mp4", moved / "v0.mp4")
    assert run("relink", proj, 1) == 2                   # not found where it was
    assert run("relink", proj, 1, moved / "v0.mp4") == 0
    capsys.readouterr()
    assert run("info", proj) == 0
    assert "frames 6" in capsys.readouterr().out


def test_import_coco_round_trip(proj, tmp_path, capsys):
    """Export labels as COCO, import them into a fresh project against the exported images."""
    from kinemark.core.project import Project
    from kinemark.core.model import ACCEPTED
    import numpy as np
    with Project.open(proj) as p:
        f = p.store.frames()[0]
        kps = np.zeros((17, 3))
        kps[:, 0] = np.linspace(20, 140, 17)
        kps[:, 1] = np.linspace(10, 110, 17)
        kps[:, 2] = 2
        p.store.save_annotation(f.id, kps, ["human"] * 17, state=ACCEPTED)
    bundle = tmp_path / "bundle"
    assert run("export", proj, bundle, "--split", "1", "0", "0") == 0
    capsys.readouterr()
    files = sorted(bundle.rglob("*.json"))
    coco_files = [p for p in files if "annotations" in json.loads(p.read_text())]
    assert coco_files, f"no COCO file among {files}"
    data = json.loads(coco_files[0].read_text())
    assert len(data["annotations"]) == 1
    image = next(iter(bundle.rglob(Path(data["images"][0]["file_name"]).name)))
    fresh = tmp_path / "fresh"
    assert run("new", fresh) == 0
    root = image.parent
    for part in Path(data["images"][0]["file_name"]).parts[:-1]:
        root = root.parent
    assert run("import-coco", fresh, coco_files[0], "--images", root) == 0
    assert "imported 1 annotation on 1 image" in capsys.readouterr().out
    with Project.open(fresh) as q:
        (a,) = q.store.annotations()
        assert np.allclose(a.keypoints, kps)


def test_benchmarks_run_at_a_reduced_size(capsys):
    """The benchmarks print figures and assert nothing; here they only have to run."""
    assert run("bench", "export", "--frames", "300") == 0
    assert run("bench", "open", "--frames", "2000") == 0
    out = capsys.readouterr().out
    assert "export" in out and "open" in out
    from kinemark.core.bench import bench_rank
    bench_rank(sizes=(500, 1500), batch=20, repeats=2)
    out = capsys.readouterr().out
    assert "median" in out and "1500/500" in out and "of 2 (range" in out
