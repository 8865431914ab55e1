"""Where exports write, and that they write all or nothing.

``kinemark export`` (COCO file, ``--images-to`` frames, ``--bundle``) and ``kinemark
agreement`` (``--html``, ``--csv``) must never write onto the project's database or a
media file, must not replace an existing file unless asked (``--overwrite``), must refuse
a wrong kind of path (a file for a folder, a folder for a file) before any work, and must
leave the disk as it was when they fail half-way (here: a source image replaced after
import, so its frame is refused). The study is invented: the Quillon Bay Stroke
Rehabilitation Clinic's participants QB-01 ... QB-04.
"""
import hashlib
import json

import numpy as np
import pytest

from conftest import write_image
from kinemark.core import export, ops, report
from kinemark.core.agreement import build_report
from kinemark.core.cli import main
from kinemark.core.errors import KinemarkError
from kinemark.core.model import ACCEPTED
from kinemark.core.project import Project
from kinemark.core.skeleton import COCO17
from kinemark.core.store import DB_NAME


def run(*args):
    return main([str(a) for a in args])


def _digest(folder, skip=None):
    """Every file under ``folder`` (hidden ones too) with the sha256 of its bytes; not
    those under ``skip`` (the project folder: its database changes when a frame is refused)."""
    return {q.relative_to(folder).as_posix(): hashlib.sha256(q.read_bytes()).hexdigest()
            for q in sorted(folder.rglob("*"))
            if q.is_file() and not (skip is not None and q.is_relative_to(skip))}


@pytest.fixture
def study(tmp_path):
    """Four participants, one accepted image each; the project is closed (the CLI opens it)."""
    root = tmp_path / "quillon_bay"
    p = Project.create(root, COCO17, owner="qb_admin")
    clips = root / "clips"
    clips.mkdir()
    k = np.column_stack([np.linspace(5, 60, 17), np.linspace(5, 44, 17), np.full(17, 2)])
    images = []
    for n in range(4):
        img = write_image(clips / f"QB-0{n + 1}_reach.png", size=(64, 48), seed=20 + n)
        ch, _ = ops.add_media(p, [img], participant=f"QB-0{n + 1}")
        p.store.save_annotation(ch.frames[0], k, ["human"] * 17, state=ACCEPTED)
        images.append(img)
    p.close()
    return root, images


def _spoil_last_frame(root):
    """Replace the source of the last exported frame with another picture, so the export
    fails on it after the frames before it were written. Returns the file and its bytes."""
    with Project.open(root) as p:
        r = p.store.export_rows([ACCEPTED])[-1]
        path = p.media_path(p.store.media(r[6]))
    original = path.read_bytes()
    write_image(path, size=(64, 48), seed=999)
    return path, original


# ---- 1. never onto the project, never over a file unless asked ---------------------------------

def test_export_and_report_refuse_the_database_its_journals_and_the_media(study, tmp_path, capsys):
    root, images = study
    db = root / DB_NAME
    (root / (DB_NAME + "-wal")).write_bytes(b"")
    link = tmp_path / "labels.json"
    link.symlink_to(db)
    media_before = {q: q.read_bytes() for q in images}
    for target in (db, root / (DB_NAME + "-wal"), images[0], link):
        assert run("export", root, target) == 2, target
        err = capsys.readouterr().err
        assert "refused to write here" in err and len(err.strip().splitlines()) == 1
        assert run("export", root, target, "--overwrite") == 2        # not even when asked to
        assert run("export", root, target, "--states", "accepted", "--format", "coco-results",
                   "--overwrite") == 2
        assert run("agreement", root, "--csv", target, "--overwrite") == 2
        assert "refused to write here" in capsys.readouterr().err
    # --html v.png would put its CSV beside it: the CSV is checked as well
    csv_beside = images[1].with_suffix(".csv")
    csv_beside.write_text("the clinic's own table")
    assert run("agreement", root, "--html", images[1].with_suffix(".html"), "--csv", images[2]) == 2
    assert run("agreement", root, "--html", csv_beside.with_suffix(".html")) == 2
    assert "exists" in capsys.readouterr().err
    assert csv_beside.read_text() == "the clinic's own table"
    assert {q: q.read_bytes() for q in images} == media_before
    assert db.read_bytes().startswith(b"SQLite format 3\0")
    for journal in root.glob(DB_NAME + "-*"):
        assert not journal.read_bytes().lstrip().startswith((b"{", b"[", b"section", b"<"))
    with Project.open(root) as p:          # the project still opens, with all its labels
        assert p.store.state_counts()[ACCEPTED] == 4


def test_an_existing_output_is_replaced_only_with_overwrite(study, tmp_path, capsys):
    root, _ = study
    out, page = tmp_path / "labels.json", tmp_path / "agreement.html"
    out.write_text("yesterday's export")
    page.with_suffix(".csv").write_text("yesterday's numbers")
    assert run("export", root, out) == 2
    assert "exists" in capsys.readouterr().err and out.read_text() == "yesterday's export"
    assert run("agreement", root, "--html", page) == 2
    captured = capsys.readouterr()
    assert "exists" in captured.err and captured.out == ""      # refused before the report is built
    assert not page.exists() and page.with_suffix(".csv").read_text() == "yesterday's numbers"
    assert run("agreement", root, "--html", tmp_path / "same.csv") == 2     # page and CSV on one path
    assert "same path" in capsys.readouterr().err
    assert run("export", root, out, "--overwrite") == 0
    assert len(json.loads(out.read_text())["annotations"]) == 4
    assert run("agreement", root, "--html", page, "--overwrite") == 0
    assert "<svg" in page.read_text() and page.with_suffix(".csv").read_text() != "yesterday's numbers"
    # frames already in the --images-to folder are outputs too
    frames = tmp_path / "frames"
    assert run("export", root, tmp_path / "a.json", "--images-to", frames) == 0
    assert run("export", root, tmp_path / "b.json", "--images-to", frames) == 2
    assert "exist already" in capsys.readouterr().err and not (tmp_path / "b.json").exists()
    assert run("export", root, tmp_path / "b.json", "--images-to", frames, "--overwrite") == 0
    assert len(list(frames.iterdir())) == 4


def test_a_missing_folder_is_created_one_level_deep_only(study, tmp_path, capsys):
    root, _ = study
    deep = tmp_path / "no_such_share" / "exports"
    for args in (("export", root, deep / "labels.json"), ("export", root, deep / "bundle", "--bundle"),
                 ("export", root, tmp_path / "o.json", "--images-to", deep / "frames"),
                 ("agreement", root, "--html", deep / "agreement.html")):
        assert run(*args) == 2, args
        err = capsys.readouterr().err
        assert "does not exist" in err and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "no_such_share").exists() and not (tmp_path / "o.json").exists()
    # one new folder for the outputs is made, as before
    assert run("export", root, tmp_path / "new_folder" / "labels.json") == 0
    assert (tmp_path / "new_folder" / "labels.json").is_file()


def test_a_file_for_a_folder_and_a_folder_for_a_file_are_refused_before_any_work(study, tmp_path, capsys):
    root, _ = study
    notes = tmp_path / "notes.txt"
    notes.write_text("session notes")
    with Project.open(root) as p:
        with pytest.raises(KinemarkError, match="names a folder, and this is a file"):
            ops.export_coco(p, tmp_path / "o.json", images_to=notes)
        with pytest.raises(KinemarkError, match="this is a folder"):
            ops.export_coco(p, tmp_path)
    assert not (tmp_path / "o.json").exists() and notes.read_text() == "session notes"
    folder = tmp_path / "reports"
    folder.mkdir()
    assert run("agreement", root, "--html", folder) == 2
    captured = capsys.readouterr()
    assert "this is a folder" in captured.err and captured.out == ""     # no report printed first
    assert list(folder.iterdir()) == []


# ---- 2. and 3. all or nothing ------------------------------------------------------------------------

def test_a_failed_bundle_leaves_the_target_as_it_was_and_a_retry_works(study, tmp_path, capsys):
    root, _ = study
    spoiled, original = _spoil_last_frame(root)
    empty = tmp_path / "empty_bundle"
    empty.mkdir()
    before = _digest(tmp_path, skip=root)
    for out in (tmp_path / "bundle", empty):
        assert run("export", root, out, "--bundle", "--split", "1", "0", "0") == 2
        assert "changed on disk" in capsys.readouterr().err
    assert not (tmp_path / "bundle").exists() and list(empty.iterdir()) == []
    assert _digest(tmp_path, skip=root) == before        # no staging folder left beside it either
    assert sorted(q.name for q in tmp_path.iterdir()) == ["empty_bundle", "quillon_bay"]
    spoiled.write_bytes(original)
    with Project.open(root) as p:
        ops.relink(p, p.store.export_rows([ACCEPTED])[-1][6])
    assert run("export", root, empty, "--bundle", "--split", "1", "0", "0") == 0
    man = json.loads((empty / "manifest.json").read_text())
    assert man["counts"]["images"] == 4
    assert {f["path"] for f in man["files"]} == set(_digest(empty)) - {"manifest.json"}


def test_a_failed_coco_export_with_frames_writes_nothing(study, tmp_path):
    root, _ = study
    _spoil_last_frame(root)
    kept = tmp_path / "kept"
    kept.mkdir()
    (kept / "readme.txt").write_text("frames of the Quillon Bay pilot")
    old = tmp_path / "old.json"
    old.write_text("yesterday's export")
    before = _digest(tmp_path, skip=root)
    with Project.open(root) as p:
        for out, frames in ((tmp_path / "o.json", tmp_path / "frames"), (old, kept),
                            (tmp_path / "frames2" / "o.json", tmp_path / "frames2")):
            with pytest.raises(KinemarkError, match="changed on disk"):
                ops.export_coco(p, out, images_to=frames)
    assert _digest(tmp_path, skip=root) == before
    assert sorted(q.name for q in tmp_path.iterdir()) == ["kept", "old.json", "quillon_bay"]


def test_the_report_page_and_its_csv_are_written_both_or_neither(study, tmp_path, monkeypatch):
    root, _ = study
    with Project.open(root) as p:
        rep = build_report(p)

    def broken(_rep):
        raise OSError(28, "No space left on device")
    monkeypatch.setattr(report, "report_frame", broken)
    with pytest.raises(OSError):
        report.write_report(rep, tmp_path / "agreement.html")
    assert list(tmp_path.iterdir()) == [root]


# ---- 5. an empty plain export says why ------------------------------------------------------------

def test_an_empty_export_names_the_states_and_what_the_project_holds(study, tmp_path, capsys):
    """The plain export of nothing writes a valid empty COCO file (test_cli documents that);
    its message, like the bundle's refusal, says which states were asked for and what the
    project holds instead."""
    root, _ = study
    with Project.open(root) as p:
        counts = p.store.state_counts()
    assert run("export", root, tmp_path / "o.json", "--states", "returned") == 0
    out = capsys.readouterr().out
    assert json.loads((tmp_path / "o.json").read_text())["annotations"] == []
    assert "no annotation is returned" in out and f"{counts[ACCEPTED]} accepted" in out
    assert run("export", root, tmp_path / "b", "--bundle", "--states", "returned", "in_review") == 2
    err = capsys.readouterr().err
    assert "no annotation is returned or in_review" in err and f"{counts[ACCEPTED]} accepted" in err
