"""COCO keypoint export/import, checked with the reference tools (pycocotools)."""
import json

import numpy as np
import pytest

from conftest import quiet, write_image, write_video
from kinemark.core import ops
from kinemark.core.errors import KinemarkError
from kinemark.core.media import Sampling
from kinemark.core.metrics import oks
from kinemark.core.model import ACCEPTED, DRAFTING, IN_REVIEW
from kinemark.core.project import Project
from kinemark.core.skeleton import COCO17


def _coco(path):
    from pycocotools.coco import COCO
    return quiet(COCO, str(path))


def _labelled(project, tmp_path, n=12, seed=0):
    v = write_video(tmp_path / "reach.mp4", n_frames=n * 2, size=(320, 240))
    ch, _ = ops.add_media(project, [v], participant="QB-01", sampling=Sampling(every=2))
    rng = np.random.default_rng(seed)
    truth = {}
    for j, fid in enumerate(ch.frames):
        k = np.column_stack([rng.uniform(40, 280, 17), rng.uniform(30, 210, 17),
                             rng.choice([0, 1, 2, 2], 17)])
        state = ACCEPTED if j % 4 != 3 else DRAFTING
        project.store.save_annotation(fid, k, ["human"] * 17, state=state, user_id=1)
        truth[fid] = (project.store.annotation(fid), state)
    return truth


def _evaluate(gt_path, results):
    from pycocotools.cocoeval import COCOeval
    gt = _coco(gt_path)
    dt = quiet(gt.loadRes, results)
    ev = COCOeval(gt, dt, iouType="keypoints")
    quiet(ev.evaluate); quiet(ev.accumulate); quiet(ev.summarize)
    return ev.stats[0]


def test_export_loads_in_pycocotools_with_the_right_fields(project, tmp_path):
    truth = _labelled(project, tmp_path)
    out = tmp_path / "out.json"
    ops.export_coco(project, out)
    gt = _coco(out)
    accepted = {fid for fid, (_, s) in truth.items() if s == ACCEPTED}
    assert set(gt.getImgIds()) == accepted
    for ann in gt.loadAnns(gt.getAnnIds()):
        a = truth[ann["image_id"]][0]
        k = np.array(ann["keypoints"]).reshape(17, 3)
        np.testing.assert_allclose(k, a.keypoints, atol=1e-3)
        assert ann["num_keypoints"] == int((a.keypoints[:, 2] > 0).sum())
        assert ann["area"] == pytest.approx(ann["bbox"][2] * ann["bbox"][3], rel=1e-3)
        assert ann["iscrowd"] == 0 and ann["category_id"] == 1
    cat = gt.loadCats(1)[0]
    assert cat["keypoints"] == list(COCO17.keypoints)
    assert cat["skeleton"][0] == [16, 14]    # 1-based, as in the COCO person category


def test_export_is_deterministic_and_state_filter(project, tmp_path):
    _labelled(project, tmp_path)
    a, b = tmp_path / "a.json", tmp_path / "b.json"
    ops.export_coco(project, a, date_created="2026-01-01")
    ops.export_coco(project, b, date_created="2026-01-01")
    assert a.read_bytes() == b.read_bytes()
    ops.export_coco(project, b, states=[DRAFTING])
    assert len(json.loads(b.read_text())["annotations"]) == 3
    with pytest.raises(KinemarkError, match="unknown state"):
        ops.export_coco(project, b, states=["done"])


def test_self_evaluation_gives_ap_one(project, tmp_path):
    _labelled(project, tmp_path)
    out = tmp_path / "gt.json"
    ops.export_coco(project, out)
    data = json.loads(out.read_text())
    res = [{"image_id": a["image_id"], "category_id": 1, "keypoints": a["keypoints"], "score": 1.0}
           for a in data["annotations"]]
    assert _evaluate(out, res) == pytest.approx(1.0)


def test_jittered_ap_falls_as_oks_predicts(project, tmp_path):
    """Shift every labelled point so each detection's OKS is exactly o; COCO AP averages the
    thresholds 0.50:0.05:0.95 (COCO keypoint evaluation), so AP = share of thresholds <= o."""
    _labelled(project, tmp_path)
    out = tmp_path / "gt.json"
    ops.export_coco(project, out)
    data = json.loads(out.read_text())
    thresholds = np.linspace(0.5, 0.95, 10)
    for target in (0.97, 0.83, 0.62, 0.3):
        res = []
        for a in data["annotations"]:
            g = np.array(a["keypoints"], float).reshape(17, 3)
            # per-keypoint similarity exp(-d^2 / (2 area k^2)) = target  =>  d = sqrt(-2 ln(target) area) k
            k = 2 * COCO17.sigma_array
            d = np.sqrt(-2 * np.log(target) * a["area"]) * k
            dt = g.copy(); dt[:, 0] += d
            assert oks(g, dt, a["area"], COCO17.sigmas, a["bbox"]) == pytest.approx(target, abs=1e-6)
            res.append({"image_id": a["image_id"], "category_id": 1,
                        "keypoints": dt.ravel().tolist(), "score": 1.0})
        expected = float(np.mean(thresholds <= target))
        assert _evaluate(out, res) == pytest.approx(expected, abs=1e-6), target


def test_round_trip_export_then_import(project, tmp_path):
    truth = _labelled(project, tmp_path)
    out, imgs = tmp_path / "bundle" / "ann.json", tmp_path / "bundle" / "images"
    ops.export_coco(project, out, images_to=imgs)
    p2 = Project.create(tmp_path / "proj2", COCO17, owner="ra2")
    ch, plan = ops.import_coco(p2, out, imgs, state=ACCEPTED)
    assert plan.problems == []
    assert len(ch.annotations) == sum(1 for _, s in truth.values() if s == ACCEPTED)
    out2 = tmp_path / "again.json"
    ops.export_coco(p2, out2)
    d1, d2 = json.loads(out.read_text()), json.loads(out2.read_text())
    k1 = sorted(tuple(a["keypoints"]) for a in d1["annotations"])
    k2 = sorted(tuple(a["keypoints"]) for a in d2["annotations"])
    assert k1 == k2
    assert d1["categories"] == d2["categories"]
    assert p2.skeleton == project.skeleton
    # the exported frames are the project's exact pixels
    a = p2.store.annotations()[0]
    f = p2.store.frame(a.frame_id)
    assert p2.store.annotation(a.frame_id).sources[0] == "imported"
    p2.close()


# ---- messy files ------------------------------------------------------------------------

def _base_file(tmp_path, n_images=3):
    root = tmp_path / "imgs"
    root.mkdir(exist_ok=True)
    images, anns = [], []
    rng = np.random.default_rng(1)
    for i in range(n_images):
        write_image(root / f"f{i}.png", size=(200, 150), seed=i)
        images.append({"id": i + 1, "file_name": f"f{i}.png", "width": 200, "height": 150})
        k = np.column_stack([rng.uniform(10, 190, 17), rng.uniform(10, 140, 17), np.full(17, 2)])
        anns.append({"id": 100 + i, "image_id": i + 1, "category_id": 1, "keypoints": k.ravel().tolist(),
                     "num_keypoints": 17, "bbox": [5, 5, 190, 140], "area": 190 * 140, "iscrowd": 0})
    cats = [{"id": 1, "name": "person", "supercategory": "person", "keypoints": list(COCO17.keypoints),
             "skeleton": [[a + 1, b + 1] for a, b in COCO17.edges]}]
    return root, {"images": images, "annotations": anns, "categories": cats}


def test_importing_the_same_file_twice_adds_no_second_person(project, tmp_path):
    root, data = _base_file(tmp_path)
    f = tmp_path / "clinic.json"
    f.write_text(json.dumps(data))
    ch1, _ = ops.import_coco(project, f, root)
    ch2, _ = ops.import_coco(project, f, root)
    assert len(ch1.annotations) == 3 and ch2.annotations == ()
    assert "already in the project" in ch2.message
    assert len(project.store.annotations()) == 3
    # a second, different person on an image is still a second person
    data["annotations"].append({**data["annotations"][0], "id": 999,
                                "keypoints": (np.array(data["annotations"][0]["keypoints"]) + [3, 2, 0] * 17).tolist()})
    f.write_text(json.dumps(data))
    ch3, _ = ops.import_coco(project, f, root)
    assert len(ch3.annotations) == 1 and len(project.store.annotations()) == 4


MESSY = {
    "unknown_image": (lambda d: d["annotations"][0].update(image_id=77), "annotation id 100.image_id"),
    "duplicate_ann_id": (lambda d: d["annotations"][1].update(id=100), "annotation id 100"),
    "duplicate_image_id": (lambda d: d["images"][1].update(id=1), "image id 1"),
    "wrong_count": (lambda d: d["annotations"][0].update(keypoints=[1, 2, 2] * 16), "annotation id 100.keypoints"),
    "dotdot": (lambda d: d["images"][0].update(file_name="../../etc/passwd"), "image id 1.file_name"),
    "absolute": (lambda d: d["images"][0].update(file_name="/etc/passwd"), "image id 1.file_name"),
    "windows_absolute": (lambda d: d["images"][0].update(file_name="C:\\x\\f0.png"), "image id 1.file_name"),
    "missing_on_disk": (lambda d: d["images"][0].update(file_name="gone.png"), "image id 1.file_name"),
    "bad_visibility": (lambda d: d["annotations"][0]["keypoints"].__setitem__(2, 7), "annotation id 100.keypoints"),
    "negative_visible": (lambda d: d["annotations"][0]["keypoints"].__setitem__(0, -4), "annotation id 100.keypoints"),
    "string_coordinate": (lambda d: d["annotations"][0]["keypoints"].__setitem__(0, "12"), "annotation id 100.keypoints"),
    "bad_bbox": (lambda d: d["annotations"][0].update(bbox=[1, 2, 3]), "annotation id 100.bbox"),
    "wrong_size": (lambda d: d["images"][0].update(width=640), "image id 1"),
}


@pytest.mark.parametrize("case", sorted(MESSY))
def test_messy_file_refused_whole_or_skipped_by_record(project, tmp_path, case):
    mutate, where = MESSY[case]
    root, data = _base_file(tmp_path)
    mutate(data)
    f = tmp_path / "messy.json"
    f.write_text(json.dumps(data))
    events = len(project.store.events())
    with pytest.raises(KinemarkError) as e:
        ops.import_coco(project, f, root, policy="refuse")
    assert where in str(e.value)
    # refused: nothing written
    assert project.store.frame_count() == 0 and len(project.store.events()) == events
    ch, plan = ops.import_coco(project, f, root, policy="skip")
    assert any(where in str(p) for p in plan.problems)
    assert 1 <= len(ch.annotations) < 3 or case in ("duplicate_image_id",)


def test_tolerated_mess(project, tmp_path):
    """Zero or negative coordinates with v=0, missing optional fields, other categories."""
    root, data = _base_file(tmp_path)
    a = data["annotations"][0]
    a["keypoints"][0:3] = [-5, 0, 0]
    a["keypoints"][3:6] = [0, 0, 0]
    for key in ("bbox", "area", "num_keypoints", "iscrowd"):
        data["annotations"][1].pop(key)
    data["categories"].append({"id": 2, "name": "chair"})
    data["annotations"].append({"id": 900, "image_id": 1, "category_id": 2, "bbox": [0, 0, 5, 5]})
    f = tmp_path / "ok.json"
    f.write_text(json.dumps(data))
    ch, plan = ops.import_coco(project, f, root)
    assert plan.problems == [] and len(ch.annotations) == 3
    assert any("chair" in n or "category 2" in n for n in plan.notices)
    anns = project.store.annotations([IN_REVIEW])
    assert tuple(anns[0].keypoints[0]) == (0.0, 0.0, 0.0)


@pytest.mark.parametrize("text,match", [
    ("{not json", "not valid JSON"),
    ("[]", "JSON object"),
    ('{"images": [], "annotations": []}', "categories"),
    ('{"images": {}, "annotations": [], "categories": []}', "must be a list"),
])
def test_unusable_files(project, tmp_path, text, match):
    f = tmp_path / "x.json"
    f.write_text(text)
    with pytest.raises(KinemarkError, match=match):
        ops.import_coco(project, f, tmp_path)


def test_skeleton_mismatch_refused(project, tmp_path):
    root, data = _base_file(tmp_path)
    data["categories"][0]["keypoints"] = data["categories"][0]["keypoints"][::-1]
    f = tmp_path / "x.json"
    f.write_text(json.dumps(data))
    with pytest.raises(KinemarkError, match="differ from the project's skeleton"):
        ops.import_coco(project, f, root)


def test_results_format_scores_with_the_reference_evaluator(project, tmp_path):
    truth = _labelled(project, tmp_path)
    for fid, (a, _) in truth.items():
        k = a.keypoints.copy()
        k[:, 0] += 1.0
        project.store.save_proposal(fid, model_id="test", model_hash="h", keypoints=k,
                                    confidence=np.ones(17), signals={}, score=0.9)
    gt, res = tmp_path / "gt.json", tmp_path / "res.json"
    ops.export_coco(project, gt)
    ops.export_coco(project, res, fmt="coco-results")
    results = json.loads(res.read_text())
    accepted = sum(1 for _, s in truth.values() if s == ACCEPTED)
    assert len(results) == accepted and set(results[0]) == {"image_id", "category_id", "keypoints", "score"}
    ap = _evaluate(gt, results)
    assert 0.5 < ap <= 1.0
