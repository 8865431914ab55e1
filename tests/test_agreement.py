"""Agreement figures, checked against the COCO OKS definition and the reference evaluator.

COCO OKS (cocodataset.org, keypoint evaluation; pycocotools COCOeval.computeOks):
OKS = sum_i exp(-d_i² / (2 s² k_i²)) δ(v_i > 0) / sum_i δ(v_i > 0), with k_i = 2 σ_i,
s² the object area, and σ the COCO sigmas (nose .026, shoulders .079, hips .107).
"""
import json
import math
import os
import stat
import sys

import numpy as np
import pytest

from conftest import quiet
from kinemark.core import agreement, ops, review
from kinemark.core.cli import main
from kinemark.core.errors import KinemarkError
from kinemark.core.skeleton import COCO17

from test_review import H, _frames, _pose, team  # noqa: F401

I = {n: i for i, n in enumerate(COCO17.keypoints)}


def _first_and_second():
    first = np.zeros((17, 3))
    for name, xy in (("nose", (50, 20)), ("left_shoulder", (30, 50)), ("right_shoulder", (70, 50)),
                     ("left_hip", (30, 90)), ("right_hip", (70, 90))):
        first[I[name]] = (*xy, 2)
    second = first.copy()
    second[I["nose"]] = (53, 24, 2)              # d = 5
    second[I["left_shoulder"]] = (30, 60, 2)     # d = 10
    second[I["left_eye"]] = (45, 15, 2)          # labelled by the second annotator only
    return first, second


# The hand-worked example (box 100 x 100, so s² = area = 10 000):
#   nose:          k = 2 x 0.026 = 0.052, 2 s² k² = 2 x 10000 x 0.002704 = 54.08,
#                  exp(-25 / 54.08)  = exp(-0.462278) = 0.629847
#   left shoulder: k = 2 x 0.079 = 0.158, 2 s² k² = 2 x 10000 x 0.024964 = 499.28,
#                  exp(-100 / 499.28) = exp(-0.200288) = 0.818495
#   three points with d = 0 contribute exp(0) = 1 each; the left eye has v = 0 in the
#   first label, so δ = 0 leaves it out.
#   OKS = (0.629847 + 0.818495 + 3) / 5 = 0.889668
# Torso: both diagonals (30,50)-(70,90) and (70,50)-(30,90) are 40·√2 = 56.5685, so
#   nose d / torso = 5 / 56.5685 = 0.088388 (within 0.1: a PCK hit),
#   left shoulder 10 / 56.5685 = 0.176777 (a miss).
HAND_NOSE, HAND_LSH, HAND_OKS = 0.629847, 0.818495, 0.889668


def _pair_project(project):
    (fid,) = _frames(project, 1)
    first, second = _first_and_second()
    review.edit(project, fid, first, H, user="ann", bbox=(0, 0, 100, 100))
    agreement.choose_frames(project, share=1.0, seed=0, user="rev")
    agreement.save_second_label(project, fid, second, user="ann2")
    return fid


def test_hand_worked_oks_example(project, team):
    assert COCO17.sigmas[I["nose"]] == pytest.approx(0.026) and COCO17.sigmas[I["left_shoulder"]] == pytest.approx(0.079)
    # the formula written out, as a check of the hand arithmetic above
    assert math.exp(-25 / (2 * 10000 * (2 * 0.026) ** 2)) == pytest.approx(HAND_NOSE, abs=1e-6)
    assert math.exp(-100 / (2 * 10000 * (2 * 0.079) ** 2)) == pytest.approx(HAND_LSH, abs=1e-6)
    _pair_project(project)
    rep = agreement.build_report(project)
    assert rep.n_pairs == 1
    assert rep.inter_frame_oks == [pytest.approx(HAND_OKS, abs=1e-6)]
    assert rep.inter["oks"][I["nose"]] == pytest.approx(HAND_NOSE, abs=1e-6)
    assert rep.inter["oks"][I["left_shoulder"]] == pytest.approx(HAND_LSH, abs=1e-6)
    assert rep.inter["oks"][I["right_hip"]] == pytest.approx(1.0)
    assert np.isnan(rep.inter["oks"][I["left_eye"]])
    assert rep.inter["mean_dist_torso"][I["nose"]] == pytest.approx(0.088388, abs=1e-6)
    assert rep.inter["mean_dist_torso"][I["left_shoulder"]] == pytest.approx(0.176777, abs=1e-6)
    assert rep.inter["pck_0.1_torso"][I["nose"]] == 1.0 and rep.inter["pck_0.1_torso"][I["left_shoulder"]] == 0.0
    assert rep.inter["n_second_only"][I["left_eye"]] == 1 and rep.inter["n_both_labelled"][I["nose"]] == 1


def test_hand_worked_example_agrees_with_pycocotools(project, team):
    pytest.importorskip("pycocotools")
    from pycocotools.coco import COCO
    from pycocotools.cocoeval import COCOeval
    first, second = _first_and_second()
    gt = COCO()
    gt.dataset = {"images": [{"id": 1, "width": 200, "height": 200, "file_name": "x.png"}],
                  "annotations": [{"id": 1, "image_id": 1, "category_id": 1, "keypoints": first.ravel().tolist(),
                                   "num_keypoints": 5, "bbox": [0, 0, 100, 100], "area": 10000.0, "iscrowd": 0}],
                  "categories": [{"id": 1, "name": "person", "keypoints": list(COCO17.keypoints)}]}
    quiet(gt.createIndex)
    dt = quiet(gt.loadRes, [{"image_id": 1, "category_id": 1, "keypoints": second.ravel().tolist(), "score": 1.0}])
    ev = COCOeval(gt, dt, iouType="keypoints")
    quiet(ev.evaluate)
    assert float(ev.ious[(1, 1)][0, 0]) == pytest.approx(HAND_OKS, abs=1e-6)


def test_agreement_uses_the_annotators_own_version_and_counts_reviewer_corrections(project, team):
    fid = _pair_project(project)
    a = project.store.annotation(fid)
    review.submit(project, a.id, user="ann")
    corrected = _first_and_second()[0]
    corrected[I["nose"]] = (50, 26, 2)            # the reviewer moves the nose by 6 px
    review.edit(project, fid, corrected, H, user="rev", bbox=(0, 0, 100, 100))
    review.accept(project, a.id, user="rev")
    rep = agreement.build_report(project)
    assert rep.inter_frame_oks == [pytest.approx(HAND_OKS, abs=1e-6)]   # unchanged by the correction
    assert rep.n_reviewed == 1 and rep.n_corrected == 1
    assert rep.corrections["n_moved"][I["nose"]] == 1 and rep.corrections["n_moved"].sum() == 1
    assert rep.corrections["mean_move_torso"][I["nose"]] == pytest.approx(6 / (40 * math.sqrt(2)))
    assert rep.by_annotator == [("ann", 1, 1)]


def test_choice_of_frames_is_seeded_and_nested(project, team):
    fids = _frames(project, 40)
    with pytest.raises(KinemarkError, match="annotator; a reviewer or admin"):
        agreement.choose_frames(project, user="ann")
    agreement.choose_frames(project, user="rev")                         # default 10 %
    ten = agreement.agreement_frames(project)
    assert len(ten) == 4 and set(ten) <= set(fids)
    # numpy's seeded generator is the reference: the first 4 of default_rng(0).permutation(40)
    assert ten == [sorted(fids)[i] for i in np.random.default_rng(0).permutation(40)[:4]]
    agreement.choose_frames(project, share=0.1, seed=0, user="rev")
    assert agreement.agreement_frames(project) == ten
    agreement.choose_frames(project, share=0.25, seed=0, user="rev")
    assert set(ten) <= set(agreement.agreement_frames(project)) and len(agreement.agreement_frames(project)) == 10
    agreement.choose_frames(project, share=0.1, seed=5, user="rev")
    other = agreement.agreement_frames(project)
    assert other != ten
    with pytest.raises(KinemarkError, match="share"):
        agreement.choose_frames(project, share=0, user="rev")
    # once second labels exist, a choice that drops their frames is refused
    agreement.save_second_label(project, other[0], _pose(), user="ann2")
    with pytest.raises(KinemarkError, match="would leave the set"):
        agreement.choose_frames(project, share=0.1, seed=0, user="rev")


def test_second_label_is_blind_and_never_exported(project, team, tmp_path):
    fid = _pair_project(project)
    # the first annotator cannot add the second label, nor see it
    with pytest.raises(KinemarkError, match="another annotator"):
        agreement.save_second_label(project, fid, _pose(), user="ann")
    assert agreement.my_second_label(project, fid, "ann") is None
    assert agreement.my_second_label(project, fid, "ann2") is not None
    assert agreement.open_tasks(project, "ann") == [] and agreement.open_tasks(project, "rev2") == [fid]
    # the event log carries no second-label points
    ev = [e for e in project.store.events() if e.entity == "second_label"]
    assert ev and all("keypoints" not in (e.after or "") for e in ev)
    a = project.store.annotation(fid)
    review.submit(project, a.id, user="ann")
    review.accept(project, a.id, user="rev")
    out = tmp_path / "o.json"
    ops.export_coco(project, out)
    data = json.loads(out.read_text())
    assert len(data["annotations"]) == 1
    np.testing.assert_allclose(np.array(data["annotations"][0]["keypoints"]).reshape(17, 3),
                               _first_and_second()[0], atol=1e-3)


def test_a_version_1_database_is_migrated_forward(tmp_path):
    import sqlite3
    from kinemark.core import store as store_mod
    db = tmp_path / store_mod.DB_NAME
    con = sqlite3.connect(db)
    for stmt in store_mod._split_sql(store_mod.MIGRATIONS[0]["sqlite"]):
        con.execute(stmt)
    con.execute("INSERT INTO meta(key, value) VALUES ('schema_version', '1')")
    con.commit()
    con.close()
    s = store_mod.Store(db)
    assert s.version() == store_mod.schema_version()
    tables = {r[0] for r in s._db.execute("SELECT name FROM sqlite_master WHERE type='table'")}
    assert {"review_notes", "agreement_frames", "second_labels"} <= tables
    assert s.agreement_frame_ids() == [] and s.second_labels() == []
    s.close()


def test_second_label_only_on_agreement_frames(project, team):
    f1, f2 = _frames(project, 2)
    project.store.set_agreement_frames([f1], seed=0, share=0.5, user_id=None)
    with pytest.raises(KinemarkError, match="not one of the agreement frames"):
        agreement.save_second_label(project, f2, _pose(), user="ann2")


def _model_project(project):
    fids = _frames(project, 3)
    for n, fid in enumerate(fids):
        k = _pose(n * 5)
        review.edit(project, fid, k, H, user="ann")
        review.submit(project, project.store.annotation(fid).id, user="ann")
        review.accept(project, project.store.annotation(fid).id, user="rev")
        project.store.save_proposal(fid, model_id="good", model_hash="a" * 16, keypoints=k,
                                    confidence=np.ones(17), signals={}, score=0.9)
        far = k.copy(); far[:, 0] += 60
        project.store.save_proposal(fid, model_id="poor", model_hash="b" * 16, keypoints=far,
                                    confidence=np.ones(17), signals={}, score=0.9)
    return fids


def test_model_keypoint_ap_from_pycocotools(project, team):
    pytest.importorskip("pycocotools")
    _model_project(project)
    rep = agreement.build_report(project)
    by = {m.model_id: m for m in rep.models}
    # pycocotools COCOeval: exact detections give AP 1; detections 60 px off on a ~110 px
    # person have OKS near 0, below every threshold 0.50:0.95, so AP 0
    assert by["good"].stats["AP"] == pytest.approx(1.0) and by["good"].n_images == 3
    assert by["poor"].stats["AP"] == pytest.approx(0.0)
    assert np.allclose(by["good"].per_keypoint["pck_0.1_torso"], 1.0)
    assert np.allclose(by["poor"].per_keypoint["pck_0.1_torso"], 0.0)
    assert agreement.BIAS_CAUTION in rep.notes


def test_without_pycocotools_the_report_says_so(project, team, monkeypatch):
    _model_project(project)
    for mod in ("pycocotools", "pycocotools.coco", "pycocotools.cocoeval"):
        monkeypatch.setitem(sys.modules, mod, None)
    rep = agreement.build_report(project)
    assert all(m.stats is None and "pycocotools is not installed" in m.message for m in rep.models)
    assert "pycocotools is not installed" in agreement.format_text(rep)


def test_agreement_command_writes_an_offline_page_and_csv(project, team, tmp_path, capsys):
    _pair_project(project)
    _model_project(project)
    root = project.root
    project.close()
    assert main(["--user", "rev", "agreement", str(root), "--pick", "--share", "0.5", "--seed", "2"]) == 2
    assert "would leave the set" in capsys.readouterr().err
    page = tmp_path / "rep" / "agreement.html"
    assert main(["agreement", str(root), "--html", str(page)]) == 0
    out = capsys.readouterr().out
    assert "mean OKS between annotators: 0.890" in out and "wrote" in out
    html = page.read_text()
    assert html.count("<svg") >= 5 and "<script" not in html and "src=" not in html and "href=" not in html
    assert stat.S_IMODE(os.stat(page).st_mode) == 0o600
    import pandas as pd
    df = pd.read_csv(page.with_suffix(".csv"))
    row = df[(df.section == "annotators") & (df.keypoint == "nose") & (df.measure == "oks")]
    assert float(row.value.iloc[0]) == pytest.approx(HAND_NOSE, abs=1e-6)
    assert set(df.section) >= {"annotators", "reviewer_corrections", "model"}
