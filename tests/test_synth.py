"""The invented demo-scenario renderer (kinemark.core.synth).

Checks against outside references: OpenCV's projectPoints for the pinhole
projection, pycocotools for the COCO file (loading, mask -> box and area,
COCOeval on the ground truth itself), OpenCV's VideoCapture for the MP4s,
clinical range-of-motion limits for the animation, and (when the bundled
BlazePose model is present) a real pose model finding the rendered figure.
"""
from __future__ import annotations

import json
from pathlib import Path

import cv2
import numpy as np
import pytest

from kinemark.core.errors import KinemarkError
from kinemark.core.skeleton import COCO17
from kinemark.core.synth import ClipInfo, render_frame, render_scenario, scenario_clips
from kinemark.core.synth import body as bd
from kinemark.core.synth import raster as rs

FACE = {"nose", "left_eye", "right_eye", "left_ear", "right_ear"}
OBJECTS = {"table", "chair", "target", "walking_aid", "clinician"}


@pytest.fixture(scope="module")
def tiny_dir(tmp_path_factory):
    out = tmp_path_factory.mktemp("tiny_a")
    calls = []
    infos = render_scenario(out, seed=7, size="tiny", progress=lambda d, t, m: calls.append((d, t)))
    return out, infos, calls


@pytest.fixture(scope="module")
def tiny_clips():
    return scenario_clips(7, "tiny")


@pytest.fixture(scope="module")
def rendered(tiny_clips):
    """Every frame of the tiny set, with and without the participant drawn."""
    return {c.name: [(c.render(i), c.render(i, with_person=False)) for i in range(c.frame_count)]
            for c in tiny_clips}


# ---------------------------------------------------------------- API and files

def test_render_scenario_writes_every_clip(tiny_dir):
    out, infos, calls = tiny_dir
    assert len(infos) == 2
    names = set()
    for info in infos:
        assert isinstance(info, ClipInfo)
        assert info.mp4_path == out / f"{info.name}.mp4" and info.mp4_path.exists()
        assert info.gt_path == out / f"{info.name}.coco.json" and info.gt_path.exists()
        assert info.name == f"{info.participant}_s{info.session}_{info.exercise}_{info.camera}"
        assert (info.width, info.height) == (320, 240)
        names.add(info.name)
    total = sum(i.frame_count for i in infos)
    assert calls[-1] == (total, total) and len(calls) == total
    doc = json.loads((out / "scenario.json").read_text())
    assert {c["name"] for c in doc["clips"]} == names
    for c in doc["clips"]:
        for key in ("participant", "session", "exercise", "camera", "lighting", "fps", "width",
                    "height", "frame_count", "seed"):
            assert key in c
    codes = {p["code"] for p in doc["participants"]}
    assert codes == {"QB-03", "QB-05"}
    by = {p["code"]: p for p in doc["participants"]}
    assert by["QB-03"]["affected_side"] == "left" and by["QB-05"]["walking_aid"] == "quad_stick"
    assert by["QB-03"]["body"]["height_m"] > 1.0


def test_demo_set_metadata_without_rendering():
    clips = scenario_clips(7, "demo")
    assert len(clips) == 24
    assert {c.person.code for c in clips} == {f"QB-0{i}" for i in range(1, 7)}
    assert {c.exercise for c in clips} == {"reach", "sts"}
    assert {c.view for c in clips} == {"front", "oblique", "side"}
    assert {c.lighting for c in clips} >= {"bright", "dim", "lowlight_grey"}
    assert len({c.name for c in clips}) == 24
    assert sum(1 for c in clips if c.person.affected) == 4      # one participant, 4 clips
    assert {c.person.code for c in clips if c.person.affected} == {"QB-03"}
    assert {c.person.code for c in clips if c.person.aid} == {"QB-05"}
    assert len({c.person.app.skin for c in clips}) == 6
    heights = {round(c.person.shape.height, 3) for c in clips}
    assert len(heights) == 6 and max(heights) - min(heights) > 0.2
    # about 15 fps, 640x480, a few seconds per clip
    assert all((c.width, c.height, c.fps) == (640, 480, 15.0) for c in clips)
    assert all(3.0 <= c.frame_count / c.fps <= 12.0 for c in clips)


def test_bad_arguments_raise_kinemark_error(tmp_path):
    with pytest.raises(KinemarkError):
        render_scenario(tmp_path, size="huge")
    with pytest.raises(KinemarkError):
        scenario_clips(-1, "tiny")


# ---------------------------------------------------------------- determinism

def test_same_seed_same_bytes_and_pixels(tiny_dir, tmp_path, rendered):
    out_a, infos_a, _ = tiny_dir
    out_b = tmp_path / "b"
    infos_b = render_scenario(out_b, seed=7, size="tiny")
    for a, b in zip(infos_a, infos_b):
        assert a.gt_path.read_bytes() == b.gt_path.read_bytes()
    assert (out_a / "scenario.json").read_bytes() == (out_b / "scenario.json").read_bytes()
    again = scenario_clips(7, "tiny")
    for clip in again:
        for i in range(clip.frame_count):
            f = clip.render(i)
            ref = rendered[clip.name][i][0]
            assert np.array_equal(f.image, ref.image)
            assert np.array_equal(f.keypoints, ref.keypoints)


def test_different_seed_differs(tiny_dir, tmp_path, rendered):
    out_a, infos_a, _ = tiny_dir
    infos_c = render_scenario(tmp_path / "c", seed=8, size="tiny")
    for a, c in zip(infos_a, infos_c):
        assert a.gt_path.read_bytes() != c.gt_path.read_bytes()
    other = scenario_clips(8, "tiny")[0]
    assert not np.array_equal(other.render(0).image, rendered[other.name][0][0].image)


# ---------------------------------------------------------------- ground truth vs pixels

def test_visibility_agrees_with_drawn_pixels(tiny_clips, rendered):
    """v=2: the participant is drawn at the joint's pixel (the frame differs from the same frame
    rendered without the participant); v=1 behind an object: that object is drawn there and the
    pixel is exactly the participant-free pixel; v=0: the projection is outside the image."""
    counts = {"v2": 0, "v1_object": 0, "v1_self": 0, "v0": 0}
    for clip in tiny_clips:
        W, H = clip.width, clip.height
        for f, empty in rendered[clip.name]:
            assert f.image.shape == (H, W, 3) and f.image.dtype == np.uint8
            differs = np.any(f.image != empty.image, axis=2)
            for k, name in enumerate(COCO17.keypoints):
                x, y, v = f.keypoints[k]
                u = f.uv[k]
                col, row = int(np.floor(u[0] + 0.5)), int(np.floor(u[1] + 0.5))
                if v == 0:
                    counts["v0"] += 1
                    assert (x, y) == (0.0, 0.0)
                    assert not (0 <= col < W and 0 <= row < H)
                    continue
                assert (x, y) == (u[0], u[1])
                assert 0 <= col < W and 0 <= row < H
                if v == 2:
                    counts["v2"] += 1
                    if name in FACE:      # face points sit on the surface: allow the outline pixel
                        win = (slice(max(row - 1, 0), row + 2), slice(max(col - 1, 0), col + 2))
                        assert f.person_mask[win].any() and differs[win].any()
                    else:
                        assert f.person_mask[row, col] and differs[row, col], (clip.name, name)
                else:
                    assert v == 1
                    what = f.occluded_by[k]
                    if what in OBJECTS:
                        counts["v1_object"] += 1
                        assert rs.OBJ_NAMES[int(f.object_ids[row, col])] == what
                        assert not differs[row, col] and not f.person_mask[row, col]
                    else:
                        assert what == "self"
                        counts["v1_self"] += 1
                        assert f.person_mask[row, col]
    # the tiny set is built to contain every case; a vacuous pass would hide a broken rule
    assert all(n > 0 for n in counts.values()), counts


def test_profile_view_hides_the_far_side():
    """Seen in profile, the far shoulder, elbow, hip, knee, eye and ear are behind the body and the
    near ones are in view (what a person labelling a side view would mark)."""
    clip = next(c for c in scenario_clips(7, "demo") if c.view == "side" and c.exercise == "sts")
    near = clip.side
    far = "left" if near == "right" else "right"
    v = np.array([clip.render(int(i)).keypoints[:, 2]
                  for i in np.linspace(0, clip.frame_count - 1, 5).astype(int)])
    for joint in ("shoulder", "elbow", "hip", "knee", "eye", "ear"):
        assert np.mean(v[:, COCO17.index(f"{near}_{joint}")] == 2) >= 0.8, joint
        assert np.mean(v[:, COCO17.index(f"{far}_{joint}")] == 1) >= 0.8, joint


def test_box_and_area_match_pycocotools_masks(tiny_clips, rendered):
    from pycocotools import mask as mask_utils
    for clip in tiny_clips:
        for f, _ in rendered[clip.name][::5]:
            rle = mask_utils.encode(np.asfortranarray(f.person_mask.astype(np.uint8)))
            assert np.allclose(mask_utils.toBbox(rle), f.bbox)
            assert int(mask_utils.area(rle)) == f.area > 0
            # every visible keypoint's pixel lies inside the visible-silhouette box
            x0, y0, w, h = f.bbox
            vis = f.keypoints[f.keypoints[:, 2] == 2]
            assert np.all(vis[:, 0] + 0.5 >= x0 - 1) and np.all(vis[:, 0] + 0.5 <= x0 + w + 1)
            assert np.all(vis[:, 1] + 0.5 >= y0 - 1) and np.all(vis[:, 1] + 0.5 <= y0 + h + 1)


def test_projection_matches_opencv(tiny_clips, rendered):
    # Reference: OpenCV cv2.projectPoints (pinhole, zero distortion) with the same R, t, K.
    for clip in tiny_clips:
        cam = clip.camera
        rvec, _ = cv2.Rodrigues(cam.R)
        for f, _ in rendered[clip.name]:
            ref, _ = cv2.projectPoints(f.joints3d.reshape(-1, 1, 3), rvec, cam.t.reshape(3, 1), cam.K,
                                       None)
            ref = ref.reshape(-1, 2)
            np.testing.assert_allclose(f.uv, ref, atol=1e-6, rtol=0)
            m = f.keypoints[:, 2] > 0
            np.testing.assert_allclose(f.keypoints[m, :2], ref[m], atol=1e-6, rtol=0)


def test_render_frame_function(tiny_clips, rendered):
    clip = tiny_clips[1]
    img, kps, box = render_frame(clip, 3)
    ref = rendered[clip.name][3][0]
    assert np.array_equal(img, ref.image) and np.array_equal(kps, ref.keypoints) and box == ref.bbox
    assert kps.shape == (17, 3)


# ---------------------------------------------------------------- COCO file

def test_coco_file_loads_and_is_consistent(tiny_dir, tiny_clips, rendered):
    from pycocotools.coco import COCO
    out, infos, _ = tiny_dir
    for info in infos:
        coco = COCO(str(info.gt_path))
        assert len(coco.getImgIds()) == info.frame_count
        cat = coco.loadCats([1])[0]
        assert cat["name"] == "person" and cat["keypoints"] == list(COCO17.keypoints)
        assert cat["skeleton"] == [[a + 1, b + 1] for a, b in COCO17.edges]
        frames = rendered[info.name]
        for img in coco.loadImgs(coco.getImgIds()):
            assert img["id"] == img["frame_index"] + 1
            assert img["file_name"] == f"{info.name}.mp4"
            assert (img["width"], img["height"]) == (info.width, info.height)
            anns = coco.loadAnns(coco.getAnnIds(imgIds=[img["id"]]))
            assert len(anns) == 1
            a = anns[0]
            kp = np.array(a["keypoints"], float).reshape(17, 3)
            assert a["category_id"] == 1 and a["iscrowd"] == 0
            assert a["num_keypoints"] == int((kp[:, 2] > 0).sum())
            assert np.all(kp[kp[:, 2] == 0, :2] == 0)
            truth = frames[img["frame_index"]][0]
            assert np.array_equal(kp[:, 2], truth.keypoints[:, 2])
            np.testing.assert_allclose(kp[:, :2], np.where(truth.keypoints[:, 2:] > 0,
                                                           truth.keypoints[:, :2], 0), atol=6e-5)
            assert a["bbox"] == truth.bbox and a["area"] == truth.area
            assert len(a["occluded_by"]) == 17


def test_cocoeval_scores_ground_truth_against_itself_as_perfect(tiny_dir):
    # Reference: pycocotools COCOeval (keypoints). The file is only usable for evaluation if
    # areas, boxes and visibilities are well formed; the ground truth as results must give AP 1.
    from pycocotools.coco import COCO
    from pycocotools.cocoeval import COCOeval
    out, infos, _ = tiny_dir
    gt = COCO(str(infos[1].gt_path))
    res = [{"image_id": a["image_id"], "category_id": 1, "keypoints": a["keypoints"], "score": 1.0}
           for a in gt.loadAnns(gt.getAnnIds())]
    dt = gt.loadRes(res)
    ev = COCOeval(gt, dt, "keypoints")
    ev.evaluate()
    ev.accumulate()
    ev.summarize()
    assert ev.stats[0] == pytest.approx(1.0)
    # and a shifted copy scores lower
    shifted = []
    for r in res:
        kp = np.array(r["keypoints"], float).reshape(17, 3)
        kp[:, 0] += np.where(kp[:, 2] > 0, 8.0, 0.0)
        shifted.append(dict(r, keypoints=kp.ravel().tolist()))
    ev2 = COCOeval(gt, gt.loadRes(shifted), "keypoints")
    ev2.evaluate()
    ev2.accumulate()
    ev2.summarize()
    assert ev2.stats[0] < 0.9


# ---------------------------------------------------------------- MP4

def test_mp4_readable_with_right_frames(tiny_dir, rendered):
    out, infos, _ = tiny_dir
    for info in infos:
        cap = cv2.VideoCapture(str(info.mp4_path))
        assert cap.isOpened()
        assert int(cap.get(cv2.CAP_PROP_FRAME_WIDTH)) == info.width
        assert int(cap.get(cv2.CAP_PROP_FRAME_HEIGHT)) == info.height
        n = 0
        errs = []
        while True:
            ok, frame = cap.read()
            if not ok:
                break
            assert frame.shape == (info.height, info.width, 3)
            errs.append(np.abs(frame.astype(int) - rendered[info.name][n][0].image.astype(int)).mean())
            n += 1
        cap.release()
        assert n == info.frame_count
        # lossy, but the decoded frames are the rendered ones (mean error in 8-bit levels)
        assert np.mean(errs) < 6.0, np.mean(errs)


# ---------------------------------------------------------------- motion

def test_motion_respects_joint_limits_and_moves(tiny_clips):
    # Limits: clinical normal range-of-motion figures (body.JOINT_LIMITS_DEG, from memory).
    for clip in tiny_clips:
        wrists, hips, knees = [], [], []
        for i in range(0, int(clip.plan.duration * 15)):
            pose = clip.plan.pose(i / 15)
            for side in ("left", "right"):
                for joint in ("elbow_flexion", "knee_flexion"):
                    lo, hi = bd.JOINT_LIMITS_DEG[joint]
                    a = np.degrees(pose.angles[f"{side}_{joint}"])
                    assert lo - 1e-6 <= a <= hi + 1e-6
            for joint in ("trunk_flexion", "trunk_lateral", "neck_flexion"):
                lo, hi = bd.JOINT_LIMITS_DEG[joint]
                assert lo - 1e-6 <= np.degrees(pose.angles[joint]) <= hi + 1e-6
            # segment lengths stay those of the body (rigid bones)
            sh = clip.person.shape
            for side in ("left", "right"):
                j = pose.j
                assert np.linalg.norm(j[f"{side}_elbow"] - j[f"{side}_shoulder"]) == pytest.approx(sh.upper_arm)
                assert np.linalg.norm(j[f"{side}_knee"] - j[f"{side}_hip"]) == pytest.approx(sh.thigh)
            wrists.append(pose.j["right_wrist"])
            hips.append(pose.P)
            knees.append(np.degrees(pose.angles["left_knee_flexion"]))
        wrists, hips = np.array(wrists), np.array(hips)
        # smooth: no joint jumps more than 12 cm between frames at 15 fps (1.8 m/s)
        assert np.max(np.linalg.norm(np.diff(wrists, axis=0), axis=1)) < 0.12
        if clip.exercise == "sts":
            top = int(np.argmax(hips[:, 2]))
            assert hips[top, 2] - hips[0, 2] > 0.2     # the participant stands up,
            assert knees[top] < 15.0 and knees[0] > 70.0   # knees straight when up, bent when seated
            assert abs(hips[-1, 2] - hips[0, 2]) < 1e-3   # and sits back down
        else:
            assert np.ptp(wrists, axis=0).max() > 0.2     # the hand travels to a target


def test_min_jerk_profile_matches_closed_form():
    # Flash & Hogan (1985): x(s) = 10 s^3 - 15 s^4 + 6 s^5; peak speed 1.875 at s = 0.5.
    from kinemark.core.synth.motion import min_jerk
    s = np.linspace(0, 1, 2001)
    x = min_jerk(s)
    v = np.gradient(x, s)
    assert x[0] == 0 and x[-1] == 1 and x[1000] == pytest.approx(0.5)
    assert v.max() == pytest.approx(1.875, abs=1e-3) and abs(s[np.argmax(v)] - 0.5) < 1e-3


# ---------------------------------------------------------------- a real pose model

MODEL = Path(__file__).resolve().parents[1] / "assets" / "models" / "pose_landmark_full.onnx"


@pytest.mark.skipif(not MODEL.exists(), reason="bundled BlazePose model not present")
def test_blazepose_finds_the_rendered_figure(tiny_clips, rendered):
    """The figure must look enough like a person for a real pose model (BlazePose GHUM full,
    the bundled ONNX conversion; contract in assets/models/MODEL_CARD.md)."""
    import onnxruntime as ort
    sess = ort.InferenceSession(str(MODEL), providers=["CPUExecutionProvider"])
    bp_index = {"left_shoulder": 11, "right_shoulder": 12, "left_hip": 23, "right_hip": 24,
                "left_knee": 25, "right_knee": 26, "left_elbow": 13, "right_elbow": 14}
    errs = []
    clip = tiny_clips[1]                                  # full body in view
    for f, _ in rendered[clip.name][::4]:
        x, y, w, h = f.bbox
        c = np.array([x + w / 2, y + h / 2])
        scale = 256.0 / (1.3 * max(w, h))
        M = np.array([[scale, 0, 128 - scale * c[0]], [0, scale, 128 - scale * c[1]]])
        crop = cv2.warpAffine(f.image, M, (256, 256), flags=cv2.INTER_LINEAR)
        inp = cv2.cvtColor(crop, cv2.COLOR_BGR2RGB).astype(np.float32)[None] / 255.0
        lm = sess.run(None, {"input_1": inp})[0].reshape(39, 5)
        for name, b in bp_index.items():
            k = COCO17.index(name)
            if f.keypoints[k, 2] == 2:
                p = (lm[b, :2] - 0.5 - M[:, 2]) / scale      # crop pixels -> frame pixels
                errs.append(np.linalg.norm(p - f.keypoints[k, :2]) / h)
    assert len(errs) > 20
    assert np.median(errs) < 0.08, np.median(errs)
