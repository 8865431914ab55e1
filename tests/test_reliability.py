"""Reliability: the project's invariants, the crash harness and the fuzzers (core/reliability.py),
and regression tests for the crashes the fuzzer found in core/coco.py.

Outside references: SQLite's documentation of WAL mode ("synchronous=NORMAL ... a
transaction committed in WAL mode with synchronous=NORMAL might roll back following a
power loss or system crash", i.e. not after an application crash) and of
``PRAGMA integrity_check``; POSIX SIGKILL (cannot be caught: the process gets no chance to
tidy up); the COCO keypoint format (cocodataset.org, "Data format": integer ids,
``keypoints`` as 3 x K numbers with v in {0, 1, 2}); the Python documentation of ``json``
(deep nesting raises RecursionError) and of the integer string conversion length limit
(Python 3.11: 4300 digits, ValueError). The demo scenario is the invented Quillon Bay
Stroke Rehabilitation Clinic.
"""
from __future__ import annotations

import json
import re
import subprocess
import sys

import numpy as np
import pytest

from conftest import write_image
from kinemark.core import coco, ops, reliability as R, review
from kinemark.core.edit import restore, snapshot
from kinemark.core.errors import KinemarkError
from kinemark.core.model import IN_REVIEW
from kinemark.core.project import Project
from kinemark.core.skeleton import COCO17

pytest.importorskip("hypothesis")

H = ["human"] * 17


def _pose(seed=0, w=64, h=48):
    return R._random_pose(np.random.default_rng(seed), w, h)


@pytest.fixture
def clinic(tmp_path):
    """The crash harness's own small project (an OpenCV-written clip, three people)."""
    root = R.build_crash_project(tmp_path / "qb", n_frames=8)
    p = Project.open(root)
    yield p
    p.close()


def _workflow(p, tmp_path):
    """A bit of everything that writes annotations: edits, the review loop, an undo that
    removes a frame's first label, an import, an agreement label."""
    fids = [f.id for f in p.store.frames()]
    for i, fid in enumerate(fids[:4]):
        review.edit(p, fid, _pose(i, 160, 120), H, user=R.ANNOTATOR)
    a = p.store.annotation(fids[0])
    review.submit(p, a.id, user=R.ANNOTATOR)
    review.edit(p, fids[0], _pose(9, 160, 120), H, user=R.REVIEWER)        # a correction in review
    review.accept(p, a.id, user=R.REVIEWER)
    review.reopen(p, a.id, note="left wrist misses the reach target", user=R.REVIEWER)
    review.edit(p, fids[0], _pose(10, 160, 120), H, user=R.ANNOTATOR)       # resumes it
    # undo of a frame's first edit removes the annotation; then label it again
    before = snapshot(p, fids[4])
    review.edit(p, fids[4], _pose(11, 160, 120), H, user=R.ANNOTATOR)
    restore(p, {fids[4]: before}, expect={fids[4]: snapshot(p, fids[4])}, user=R.ANNOTATOR)
    review.edit(p, fids[4], _pose(12, 160, 120), H, user=R.ANNOTATOR)
    # an import
    (tmp_path / "imp").mkdir()
    img = write_image(tmp_path / "imp" / "qb.png", size=(64, 48))
    k = _pose(13).ravel().tolist()
    f = tmp_path / "imp.json"
    f.write_text(json.dumps({"images": [{"id": 1, "file_name": img.name, "width": 64, "height": 48}],
                             "annotations": [{"id": 5, "image_id": 1, "category_id": 1, "keypoints": k}],
                             "categories": [{"id": 1, "name": "person", "keypoints": list(COCO17.keypoints)}]}))
    ops.import_coco(p, f, img.parent, user=R.ADMIN)
    # an agreement label by someone who did not make the first one
    p.store.set_agreement_frames([fids[1]], seed=0, share=0.1, user_id=None)
    p.store.save_second_label(fids[1], _pose(14, 160, 120), user_id=p.store.user(R.REVIEWER).id)
    p.store.save_second_label(fids[1], _pose(15, 160, 120), user_id=p.store.user(R.REVIEWER).id)
    return fids


def test_invariants_hold_after_a_full_workflow(clinic, tmp_path):
    _workflow(clinic, tmp_path)
    assert len(clinic.store.annotations()) == 6
    assert R.check_invariants(clinic) == []


def _kp_text(k):
    return json.dumps([[float(x), float(y), int(v)] for x, y, v in k])


CORRUPTIONS = {
    # name: (SQL that bypasses the store, words the problem must contain)
    "version without its event": ("UPDATE annotations SET version=version+1 WHERE id=?", "version"),
    "sixteen keypoints": ("UPDATE annotations SET keypoints=? WHERE id=?", "shape"),
    "visibility 3": ("UPDATE annotations SET keypoints=? WHERE id=?", "visibility"),
    "unlabelled point with a position": ("UPDATE annotations SET keypoints=? WHERE id=?", "unlabelled"),
    "keypoints not in the log": ("UPDATE annotations SET keypoints=? WHERE id=?", "differ"),
    "state not in the log": ("UPDATE annotations SET state='accepted' WHERE id=?", "state"),
    "unknown source": ("UPDATE annotations SET sources=? WHERE id=?", "sources"),
    "annotation without event": (None, "no event row"),
    "removed event row": (None, "jump"),
}


@pytest.mark.parametrize("name", sorted(CORRUPTIONS))
def test_invariants_find_injected_corruption(clinic, tmp_path, name):
    fids = _workflow(clinic, tmp_path)
    assert R.check_invariants(clinic) == []
    db = clinic.store._db
    a = clinic.store.annotation(fids[2])
    sql, words = CORRUPTIONS[name]
    k = a.keypoints.copy()
    if name == "sixteen keypoints":
        db.execute(sql, (_kp_text(k[:16]), a.id))
    elif name == "visibility 3":
        k[3, 2] = 3
        db.execute(sql, (_kp_text(k), a.id))
    elif name == "unlabelled point with a position":
        k[3] = (12.0, 7.0, 0)
        db.execute(sql, (_kp_text(k), a.id))
    elif name == "keypoints not in the log":
        k[k[:, 2] > 0, 0] += 1.0
        db.execute(sql, (_kp_text(k), a.id))
    elif name == "unknown source":
        db.execute(sql, (json.dumps(["guess"] * 17), a.id))
    elif name == "annotation without event":
        db.execute("INSERT INTO annotations(frame_id, person, skeleton_id, keypoints, sources, state, version)"
                   " VALUES (?, 1, 1, ?, ?, 'drafting', 1)", (fids[3], _kp_text(k), json.dumps(H)))
    elif name == "removed event row":
        db.execute("DROP TRIGGER events_append_only_delete")
        db.execute("DELETE FROM events WHERE id=?", (clinic.store.events()[3].id,))
    else:
        db.execute(sql, (a.id,))
    problems = R.check_invariants(clinic)
    assert problems and any(words in p for p in problems), problems


def _acks_for(p, changes, kps=None, kind="edit"):
    out = []
    for ch, k in zip(changes, kps):
        a = p.store.annotation_by_id(ch.annotations[0])
        out.append(R.Ack(kind, a.frame_id, a.id, ch.details["version"], ch.details["state"], R.kp_checksum(k)))
    return out


def test_verify_acks_finds_what_is_missing(clinic):
    fids = [f.id for f in clinic.store.frames()]
    kps = [_pose(i, 160, 120) for i in range(3)]
    chs = [review.edit(clinic, fids[i], kps[i], H, user=R.ANNOTATOR) for i in range(3)]
    acks = _acks_for(clinic, chs, kps)
    assert R.verify_acks(clinic, acks) == []
    # a newer version than acknowledged is fine
    review.edit(clinic, fids[0], _pose(7, 160, 120), H, user=R.ANNOTATOR)
    assert R.verify_acks(clinic, acks) == []
    a = acks[1]
    fakes = [R.Ack(a.kind, a.frame_id, a.annotation_id, a.version + 1, a.state, a.checksum),
             R.Ack(a.kind, a.frame_id, a.annotation_id, a.version, a.state, "0" * 16),
             R.Ack(a.kind, a.frame_id, a.annotation_id, a.version, IN_REVIEW, a.checksum),
             R.Ack(a.kind, a.frame_id, 999, 1, a.state, a.checksum)]
    for fake in fakes:
        assert len(R.verify_acks(clinic, [fake])) == 1, fake
    # an acknowledgement of a change that was never committed (acked, then rolled back)
    k = _pose(8, 160, 120)
    lying = []
    with pytest.raises(RuntimeError):
        with clinic.store.tx():
            ch = review.edit(clinic, fids[2], k, H, user=R.ANNOTATOR)
            lying = _acks_for(clinic, [ch], [k])
            raise RuntimeError("killed before the commit")
    assert len(R.verify_acks(clinic, lying)) == 1


def test_parse_ack_only_takes_complete_lines():
    line = "ACK edit 3 7 12 drafting 0123456789abcdef END\n"
    assert R.parse_ack(line) == R.Ack("edit", 3, 7, 12, "drafting", "0123456789abcdef")
    for cut in (line[:-1], line[:-5], line[:30], "READY\n", ""):
        assert R.parse_ack(cut) is None


def test_kp_checksum_treats_unlabelled_points_as_coco_zeros():
    k = _pose(1)
    k2 = k.copy()
    k2[k2[:, 2] == 0, :2] = 55.0
    assert R.kp_checksum(k) == R.kp_checksum(k2)
    k2[k2[:, 2] > 0, 0] += 0.01
    assert R.kp_checksum(k) != R.kp_checksum(k2)


def test_the_child_acknowledges_only_committed_changes(tmp_path):
    root = R.build_crash_project(tmp_path / "qb", n_frames=6)
    out = subprocess.run([sys.executable, "-m", "kinemark.core.reliability", "child", str(root),
                          "--seed", "4", "--max-ops", "40"], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    acks = [R.parse_ack(line + "\n") for line in out.stdout.splitlines()[1:]]
    assert len(acks) == 40 and all(acks)
    assert len({a.kind for a in acks}) >= 3          # edits and review transitions
    with Project.open(root) as p:
        assert R.verify_acks(p, acks) == []
        assert R.check_invariants(p) == []
        versions = sum(a.version for a in p.store.annotations())
        assert versions >= 40       # every acknowledged change raised a version at least once


def test_crash_harness_small_run():
    """Five SIGKILLs at seeded random moments; the full fifty are in ``kinemark bench crash``."""
    rep = R.crash_run(5, seed=3, max_run=0.3, early_share=0.2)
    assert rep.kills == 5 and rep.child_errors == []
    assert rep.acks > 0 and rep.kills > rep.early_kills
    assert rep.integrity == [] and rep.violations == [] and rep.lost == []


# ---- fuzzers -----------------------------------------------------------------------------------

def test_fuzz_coco_import_few_hundred_cases():
    rep = R.fuzz_coco(300, seed=0)
    assert rep.cases == 300 and rep.calls == 600
    assert rep.crashes == [] and rep.partial == [] and rep.escapes == [] and rep.violations == []
    assert rep.disagreements == []
    # both outcomes of both policies happen, so the writing path is exercised too
    o = rep.outcomes
    assert o.get("refuse: imported something", 0) >= 10 and o.get("refuse: refused", 0) >= 100
    assert o.get("skip: imported something", 0) >= 10 and o.get("skip: refused", 0) >= 10


def test_the_coco_fuzzer_counts_crashes_and_partial_writes(monkeypatch):
    """The harness is only worth its zeros if it sees a crash and a partial write when there is one."""
    real_import, real_plan = ops.import_coco, coco.plan_import

    def leaky(project, file, root, *, policy="refuse", **k):
        project.store.log_event("probe", "fuzz", None, None, {"written": True})
        return real_import(project, file, root, policy=policy, **k)
    monkeypatch.setattr(ops, "import_coco", leaky)
    rep = R.fuzz_coco(30, seed=1)
    assert len(rep.partial) >= 10 and rep.crashes == []
    monkeypatch.setattr(ops, "import_coco", real_import)

    def blind(data, skeleton, root, **k):      # an importer that overlooks every problem
        plan = real_plan(data, skeleton, root, **k)
        plan.problems.clear()
        return plan
    monkeypatch.setattr(coco, "plan_import", blind)
    rep = R.fuzz_coco(60, seed=2)
    # the blind importer is caught either writing from a defective file, or accepting one and
    # writing nothing (which of the two depends on the cases drawn, that is on the version of
    # the property-testing library; an import now leaves out keypoints already on a frame)
    assert any("refuse wrote from a defective file" in m for m, _ in rep.partial) or \
        any("refuse accepted a defective file" in m for m, _ in rep.disagreements)

    def broken(data, skeleton, root, **k):
        if isinstance(data, dict) and len(data.get("images") or []) >= 2:
            raise TypeError("a crash in the importer")
        return real_plan(data, skeleton, root, **k)
    monkeypatch.setattr(coco, "plan_import", broken)
    rep = R.fuzz_coco(30, seed=1)
    assert rep.crashes and all("TypeError" in m for m, _ in rep.crashes)


def test_independent_coco_check_agrees_on_known_defects():
    good = {"images": [{"id": 1, "file_name": "a.png", "width": 64, "height": 48}],
            "annotations": [{"id": 1, "image_id": 1, "category_id": 1, "keypoints": [10, 10, 2] * 17}],
            "categories": [{"id": 1, "name": "person", "keypoints": list(COCO17.keypoints)}]}
    names = list(COCO17.keypoints)
    assert R.coco_defects(good, R.GOOD_IMAGES, names) == []
    for mutate in (lambda d: d["images"][0].update(file_name="../a.png"),
                   lambda d: d["images"][0].update(width=65),
                   lambda d: d["annotations"][0].update(keypoints=[10, 10, 2] * 16),
                   lambda d: d["annotations"][0]["keypoints"].__setitem__(2, 3),
                   lambda d: d["annotations"][0]["keypoints"].__setitem__(0, 70),
                   lambda d: d["annotations"].append(dict(d["annotations"][0])),
                   lambda d: d["categories"][0].update(keypoints=names[::-1])):
        d = json.loads(json.dumps(good))
        mutate(d)
        assert R.coco_defects(d, R.GOOD_IMAGES, names), d


def test_fuzz_media_import_cases():
    rep = R.fuzz_media(50, seed=0)
    assert rep.cases == 50
    assert rep.crashes == [] and rep.partial == [] and rep.escapes == [] and rep.violations == []
    assert rep.disagreements == []
    assert rep.outcomes.get("added", 0) >= 3 and rep.outcomes.get("refused", 0) >= 3
    # a damaged stream may decode differently from run to run (FFmpeg's error concealment);
    # such a frame must be refused by its import checksum, never shown with other pixels
    assert all("decodes to different pixels" in m for m, _ in rep.unreadable)


# ---- regressions: crashes the fuzzer found in core/coco.py -------------------------------------

def _file(tmp_path, data=None, text=None):
    f = tmp_path / "found.json"
    f.write_text(text if text is not None else json.dumps(data))
    return f


@pytest.fixture
def one_image(tmp_path):
    root = tmp_path / "images"
    root.mkdir()
    write_image(root / "a.png", size=(64, 48))
    return root


def _doc(**over):
    d = {"images": [{"id": 1, "file_name": "a.png", "width": 64, "height": 48}],
         "annotations": [{"id": 1, "image_id": 1, "category_id": 1, "keypoints": [10, 10, 2] * 17}],
         "categories": [{"id": 1, "name": "person", "keypoints": list(COCO17.keypoints)}]}
    for path, value in over.items():
        table, field_ = path.split(".")
        d[table][0][field_] = value
    return d


@pytest.mark.parametrize("over,where", [
    ({"images.width": 10 ** 400}, "image id 1.width"),                 # was OverflowError
    ({"annotations.keypoints": [10 ** 400, 10, 2] + [10, 10, 2] * 16}, "annotation id 1.keypoints"),
    ({"annotations.bbox": [0, 0, 10 ** 400, 5]}, "annotation id 1.bbox"),
    ({"categories.id": [1]}, "categories[0]"),                          # was TypeError: unhashable
    ({"annotations.image_id": [1]}, "annotation id 1.image_id"),
])
def test_huge_numbers_and_list_ids_are_problems_not_crashes(project, tmp_path, one_image, over, where):
    f = _file(tmp_path, _doc(**over))
    with pytest.raises(KinemarkError, match="problem.*" + re.escape(where)):
        ops.import_coco(project, f, one_image, policy="refuse")
    assert project.store.frame_count() == 0
    _, plan = ops.import_coco(project, f, one_image, policy="skip")
    assert any(str(p).startswith(where) for p in plan.problems), plan.problems


def test_unhashable_category_of_an_annotation_is_ignored(project, tmp_path, one_image):
    f = _file(tmp_path, _doc(**{"annotations.category_id": {"id": 1}}))     # was TypeError: unhashable
    ch, plan = ops.import_coco(project, f, one_image, policy="refuse")
    assert ch.annotations == () and plan.problems == [] and len(plan.notices) == 1


@pytest.mark.parametrize("text,match", [
    ('{"images": ' + "[" * 100_000 + "]" * 100_000 + ', "annotations": [], "categories": []}', "nested too deeply"),
    ('{"images": [{"id": 1' + "9" * 5000 + '}], "annotations": [], "categories": []}', "digits"),
], ids=["nested-100000-deep", "integer-of-5001-digits"])
def test_json_that_python_cannot_read_is_refused(project, tmp_path, one_image, text, match):
    with pytest.raises(KinemarkError, match=match):
        ops.import_coco(project, _file(tmp_path, text=text), one_image)
