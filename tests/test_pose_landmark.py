"""LandmarkAdapter: loading errors, crop geometry, flip handling, and the bundled model on a person.

Three kinds of model are used:

* tiny ONNX models built here with onnx.helper that honour the BlazePose
  output contract but emit constant landmarks, so where each keypoint must
  land in the frame follows from the Region definition (docstring of
  kinemark.core.pose.base.Region) and the model's coordinate convention
  (x, y in input pixels, 0 and 256 at the crop's edges), computed here by
  hand and not with the adapter's own geometry code;
* a tiny wrong model, for the contract check;
* the bundled BlazePose model, on the demo renderer's invented figures,
  scored with pycocotools' COCOeval (the reference COCO keypoint evaluator).
"""
import json
import math
import sys

import cv2
import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper

from kinemark.core.errors import KinemarkError
from kinemark.core.pose import landmark as lmk
from kinemark.core.pose.base import PoseResult, Region
from kinemark.core.pose.crop import frame_to_crop_matrix
from kinemark.core.pose.landmark import (BLAZEPOSE_LANDMARKS, MODEL_FLIP_PERMUTATION,
                                         LandmarkAdapter, region_from_alignment,
                                         region_from_keypoints, unmirror_landmarks,
                                         upright_angle)
from kinemark.core.skeleton import COCO17, Skeleton

BUNDLED = lmk.assets_models_dir() / "pose_landmark_full.onnx"
needs_bundled = pytest.mark.skipif(not BUNDLED.is_file(), reason="bundled model not present")


# -- tiny models ----------------------------------------------------------------------

def _contract_model(path, landmarks, flag=0.9, heat=None):
    """A model with BlazePose's inputs/outputs whose outputs ignore the image.

    landmarks (39, 5) raw values; heat (64, 64, 39) heatmap logits (default -10).
    """
    if heat is None:
        heat = np.full((64, 64, 39), -10.0, np.float32)
    inp = helper.make_tensor_value_info("input_1", TensorProto.FLOAT, [1, 256, 256, 3])
    outs = [helper.make_tensor_value_info("Identity", TensorProto.FLOAT, [1, 195]),
            helper.make_tensor_value_info("Identity_1", TensorProto.FLOAT, [1, 1]),
            helper.make_tensor_value_info("Identity_3", TensorProto.FLOAT, [1, 64, 64, 39])]
    inits = [numpy_helper.from_array(np.asarray(landmarks, np.float32).reshape(1, 195), "lm"),
             numpy_helper.from_array(np.array([[flag]], np.float32), "flag"),
             numpy_helper.from_array(np.asarray(heat, np.float32)[None], "hm"),
             numpy_helper.from_array(np.zeros((), np.float32), "zero"),
             numpy_helper.from_array(np.array([1], np.int64), "ax1")]
    nodes = [helper.make_node("ReduceMean", ["input_1"], ["m4"], axes=[1, 2, 3], keepdims=1),
             helper.make_node("Mul", ["m4", "zero"], ["z4"]),
             helper.make_node("ReduceMean", ["input_1"], ["m1"], axes=[1, 2, 3], keepdims=0),
             helper.make_node("Mul", ["m1", "zero"], ["z1v"]),
             helper.make_node("Unsqueeze", ["z1v", "ax1"], ["z1"]),
             helper.make_node("Add", ["lm", "z1"], ["Identity"]),
             helper.make_node("Add", ["flag", "z1"], ["Identity_1"]),
             helper.make_node("Add", ["hm", "z4"], ["Identity_3"])]
    graph = helper.make_graph(nodes, "contract", [inp], outs, initializer=inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    onnx.checker.check_model(model)
    onnx.save(model, str(path))
    return path


def _wrong_model(path):
    inp = helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 3])
    out = helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 3])
    graph = helper.make_graph([helper.make_node("Identity", ["x"], ["y"])], "wrong", [inp], [out])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    onnx.save(model, str(path))
    return path


def _frame_point(region, x, y):
    """Model output (x, y) -> frame pixels, straight from the Region docstring.

    The region's x axis is (cos a, sin a), its y axis (-sin a, cos a); model x
    runs 0..256 across the region's width, y 0..256 down its height.
    """
    a = region.angle
    ex, ey = np.array([math.cos(a), math.sin(a)]), np.array([-math.sin(a), math.cos(a)])
    return (np.array([region.cx, region.cy]) + (x / 256 - 0.5) * region.w * ex
            + (y / 256 - 0.5) * region.h * ey)


def _logit(p):
    return math.log(p / (1 - p))


# -- loading errors -----------------------------------------------------------------

def test_missing_model_file_names_the_path(tmp_path):
    missing = tmp_path / "nowhere.onnx"
    with pytest.raises(KinemarkError, match="not found") as e:
        LandmarkAdapter(COCO17, missing)
    assert str(missing) in str(e.value)


def test_missing_bundled_model_mentions_assets_override(tmp_path, monkeypatch):
    monkeypatch.setenv("KINEMARK_ASSETS", str(tmp_path))
    with pytest.raises(KinemarkError, match="KINEMARK_ASSETS") as e:
        LandmarkAdapter(COCO17)
    assert str(tmp_path / "models") in str(e.value)


@needs_bundled
def test_truncated_model_is_reported_as_damaged(tmp_path):
    data = BUNDLED.read_bytes()
    bad = tmp_path / "cut.onnx"
    bad.write_bytes(data[: len(data) // 3])
    with pytest.raises(KinemarkError, match="damaged") as e:
        LandmarkAdapter(COCO17, bad)
    assert str(bad) in str(e.value)


def test_garbage_and_empty_files_are_reported(tmp_path):
    junk = tmp_path / "junk.onnx"
    junk.write_bytes(b"this is not a model at all" * 10)
    with pytest.raises(KinemarkError, match="damaged"):
        LandmarkAdapter(COCO17, junk)
    empty = tmp_path / "empty.onnx"
    empty.write_bytes(b"")
    with pytest.raises(KinemarkError, match="empty"):
        LandmarkAdapter(COCO17, empty)


def test_garbage_is_reported_without_the_onnx_package(tmp_path, monkeypatch):
    monkeypatch.setitem(sys.modules, "onnx", None)  # import onnx now raises ImportError
    junk = tmp_path / "junk.onnx"
    junk.write_bytes(b"\x08\x07garbage" * 50)
    with pytest.raises(KinemarkError, match="damaged"):
        LandmarkAdapter(COCO17, junk)


def test_wrong_model_contract_lists_expected_and_found(tmp_path):
    path = _wrong_model(tmp_path / "wrong.onnx")
    with pytest.raises(KinemarkError, match="not the BlazePose") as e:
        LandmarkAdapter(COCO17, path)
    msg = str(e.value)
    assert "[1, 256, 256, 3]" in msg and "x [1, 3]" in msg


def test_sha256_mismatch_with_model_json(tmp_path):
    path = _contract_model(tmp_path / "m.onnx", np.zeros((39, 5)))
    (tmp_path / "model.json").write_text(json.dumps({"file": "m.onnx", "sha256": "0" * 64}))
    with pytest.raises(KinemarkError, match="sha256"):
        LandmarkAdapter(COCO17, path)


def test_skeleton_with_no_known_keypoint_lists_the_names(tmp_path):
    path = _contract_model(tmp_path / "m.onnx", np.zeros((39, 5)))
    sk = Skeleton("tail", ("tail_base", "tail_tip"), (), (), (0.05, 0.05))
    with pytest.raises(KinemarkError) as e:
        LandmarkAdapter(sk, path)
    msg = str(e.value)
    assert "tail_base" in msg and "tail_tip" in msg and "left_foot_index" in msg


def test_partial_coverage_and_aliases(tmp_path):
    path = _contract_model(tmp_path / "m.onnx", np.zeros((39, 5)))
    sk = Skeleton("feet", ("nose", "tail_tip", "left_big_toe", "right_heel"), (), (),
                  (0.05,) * 4)
    a = LandmarkAdapter(sk, path)
    assert a.covered().tolist() == [True, False, True, True]
    assert a.not_covered() == ["tail_tip"]
    assert a.approximate() == ["left_big_toe"]
    assert a.describe()["keypoints"] == ["nose", "left_big_toe", "right_heel"]


def test_topology_table_matches_published_indices():
    # Indices from the MediaPipe Pose documentation / Bazarevsky et al. 2020.
    expect = {0: "nose", 2: "left_eye", 5: "right_eye", 7: "left_ear", 8: "right_ear",
              9: "mouth_left", 10: "mouth_right", 11: "left_shoulder", 12: "right_shoulder",
              13: "left_elbow", 14: "right_elbow", 15: "left_wrist", 16: "right_wrist",
              17: "left_pinky", 22: "right_thumb", 23: "left_hip", 24: "right_hip",
              25: "left_knee", 26: "right_knee", 27: "left_ankle", 28: "right_ankle",
              29: "left_heel", 30: "right_heel", 31: "left_foot_index", 32: "right_foot_index"}
    for i, name in expect.items():
        assert BLAZEPOSE_LANDMARKS[i] == name
    assert len(BLAZEPOSE_LANDMARKS) == 33


# -- geometry -------------------------------------------------------------------------

def test_crop_round_trip_against_warpaffine():
    """A blob placed in a frame, cropped by cv2.warpAffine, found and mapped back."""
    h, w = 360, 480
    x0, y0 = 301.3, 122.6
    yy, xx = np.mgrid[0:h, 0:w]
    frame = np.exp(-((xx - x0) ** 2 + (yy - y0) ** 2) / (2 * 3.0 ** 2))
    frame = (frame * 250).astype(np.float32)
    region = Region(260.0, 170.0, 300.0, 300.0, angle=0.6)
    m = frame_to_crop_matrix(region, 256, 256)
    crop = cv2.warpAffine(frame, m, (256, 256), flags=cv2.INTER_LINEAR)
    # intensity-weighted centroid of the blob in the crop, OpenCV pixel centres
    cy_, cx_ = np.mgrid[0:256, 0:256]
    wsum = crop.sum()
    u, v = (crop * cx_).sum() / wsum, (crop * cy_).sum() / wsum
    back = lmk.model_to_frame(np.array([[u + 0.5, v + 0.5]]), region)[0]
    assert np.hypot(back[0] - x0, back[1] - y0) < 0.05
    # and the mapping agrees with the Region definition written out by hand
    hand = _frame_point(region, u + 0.5, v + 0.5)
    assert np.allclose(back, hand, atol=1e-9)


def test_predict_maps_constant_landmarks_through_a_rotated_region(tmp_path):
    lm = np.zeros((39, 5))
    rng = np.random.default_rng(3)
    lm[:, :2] = rng.uniform(20, 236, (39, 2))
    lm[:, 3] = 6.0
    lm[:, 4] = 6.0
    path = _contract_model(tmp_path / "m.onnx", lm, flag=0.8)
    a = LandmarkAdapter(COCO17, path, flip=False, refine=False)
    frame = np.zeros((400, 600, 3), np.uint8)
    region = Region(300.0, 210.0, 250.0, 250.0, angle=-0.4, source="drawn")
    r = a.predict(frame, region)
    assert isinstance(r, PoseResult) and r.region.source == "drawn"
    for k, name in enumerate(COCO17.keypoints):
        j = BLAZEPOSE_LANDMARKS.index(name)
        assert np.allclose(r.keypoints[k, :2], _frame_point(region, *lm[j, :2]), atol=1e-6)
    assert (r.keypoints[:, 2] == 2).all()
    conf = (1 / (1 + math.exp(-6.0))) ** 2
    assert np.allclose(r.confidence, conf)
    assert r.score == pytest.approx(0.8 * conf, rel=1e-5)
    assert np.isnan(r.signals["pass_disagreement"]).all()
    assert np.isnan(r.signals["flip_disagreement"]).all()


def test_visibility_levels_and_outside_frame(tmp_path):
    lm = np.zeros((39, 5))
    lm[:, :2] = 128.0
    lm[:, 4] = 6.0
    lm[:, 3] = 6.0
    nose, lw, rw = 0, 15, 16
    lm[lw, 3] = _logit(0.2)            # low visibility -> v = 1
    lm[rw, 0] = -200.0                 # far left of the crop, outside the frame -> v = 0
    lm[nose, 4] = _logit(0.05)         # model says absent -> v = 0
    path = _contract_model(tmp_path / "m.onnx", lm)
    a = LandmarkAdapter(COCO17, path, flip=False, refine=False)
    frame = np.zeros((300, 300, 3), np.uint8)
    r = a.predict(frame, Region(150, 150, 256, 256))
    v = dict(zip(COCO17.keypoints, r.keypoints[:, 2]))
    assert v["left_wrist"] == 1 and v["right_wrist"] == 0 and v["nose"] == 0
    assert v["left_hip"] == 2
    assert r.keypoints[COCO17.index("right_wrist"), 0] < 0  # the estimate is kept


def test_crop_order_of_preference(tmp_path):
    lm = np.zeros((39, 5))
    lm[:, :2] = np.random.default_rng(0).uniform(60, 200, (39, 2))
    lm[lmk.AUX_HIP_CENTRE, :2] = (128, 150)
    lm[lmk.AUX_SCALE_POINT, :2] = (128, 60)
    lm[:, 3:] = 4.0
    a = LandmarkAdapter(COCO17, _contract_model(tmp_path / "m.onnx", lm), flip=False,
                        passes=2, alignment_scale=1.25)
    frame = np.zeros((240, 320, 3), np.uint8)
    drawn = a.predict(frame, Region(100, 100, 80, 120, source="drawn"))
    assert drawn.region.source == "drawn" and drawn.region.w == drawn.region.h == 120
    prev = drawn.keypoints.copy()
    prev[:, 2] = 2
    nb = a.predict(frame, previous=prev)
    assert nb.region.source == "neighbour"
    assert np.isnan(nb.signals["pass_disagreement"]).all()
    two = a.predict(frame)
    assert two.region.source == "first_pass"
    assert np.isfinite(two.signals["pass_disagreement"]).all()
    # the second pass's crop is the one the alignment points define (frame pixels)
    first = lmk.whole_frame_region(320, 240)
    c = _frame_point(first, 128, 150)
    t = _frame_point(first, 128, 60)
    assert (two.region.cx, two.region.cy) == pytest.approx(tuple(c))
    assert two.region.w == pytest.approx(2 * 1.25 * np.hypot(*(t - c)))
    assert two.region.angle == pytest.approx(0.0)
    # with three passes the third crop is built from the second crop's alignment points
    a3 = LandmarkAdapter(COCO17, _contract_model(tmp_path / "m.onnx", lm), flip=False,
                         passes=3, alignment_scale=1.25)
    three = a3.predict(frame)
    c3, t3 = _frame_point(two.region, 128, 150), _frame_point(two.region, 128, 60)
    assert (three.region.cx, three.region.cy) == pytest.approx(tuple(c3))
    assert three.region.w == pytest.approx(2 * 1.25 * np.hypot(*(t3 - c3)))
    single = LandmarkAdapter(COCO17, _contract_model(tmp_path / "m.onnx", lm), flip=False,
                             passes=1).predict(frame)
    assert single.region.source == "frame"
    assert np.isnan(single.signals["pass_disagreement"]).all()


def test_region_from_keypoints_is_upright_along_the_body():
    # shoulders to the right of the hips: a body lying along +x
    names = COCO17.keypoints
    xy = np.zeros((17, 2))
    valid = np.zeros(17, bool)
    for n, p in {"left_hip": (100, 210), "right_hip": (100, 190),
                 "left_shoulder": (160, 212), "right_shoulder": (160, 188),
                 "nose": (190, 200), "left_ankle": (20, 205)}.items():
        xy[names.index(n)] = p
        valid[names.index(n)] = True
    axis = ((names.index("left_hip"), names.index("right_hip")),
            (names.index("left_shoulder"), names.index("right_shoulder")))
    reg = region_from_keypoints(xy, valid, margin=0.2, upright_axis=axis)
    assert reg.w == pytest.approx(reg.h)
    m = frame_to_crop_matrix(reg, 256, 256)
    crop_pts = xy[valid] @ m[:, :2].T + m[:, 2]
    hip_c = (xy[names.index("left_hip")] + xy[names.index("right_hip")]) / 2 @ m[:, :2].T + m[:, 2]
    sho_c = (xy[names.index("left_shoulder")] + xy[names.index("right_shoulder")]) / 2 @ m[:, :2].T + m[:, 2]
    assert sho_c[1] < hip_c[1] - 30          # shoulders above hips in the crop
    assert abs(sho_c[0] - hip_c[0]) < 1e-6   # straight above
    assert (crop_pts >= 0).all() and (crop_pts <= 255).all()
    # box extent: 170 px of body along the axis, 20% margin each side
    assert reg.h == pytest.approx(170 * 1.4)
    assert upright_angle((0, 0), (0, -1)) == 0.0
    assert region_from_keypoints(xy, np.zeros(17, bool)) is None


def test_region_from_alignment_points():
    r = region_from_alignment((100, 200), (100, 120), scale=1.25)
    assert (r.cx, r.cy, r.w, r.h) == (100, 200, 200, 200) and r.angle == 0.0
    r = region_from_alignment((100, 200), (180, 200))
    assert r.angle == pytest.approx(math.pi / 2)
    assert region_from_alignment((5, 5), (5, 5)) is None


# -- flip handling --------------------------------------------------------------------

def test_flip_permutation_swaps_left_and_right():
    p = MODEL_FLIP_PERMUTATION
    assert (p[p] == np.arange(39)).all()
    names = BLAZEPOSE_LANDMARKS
    for i, n in enumerate(names):
        if n.startswith("left_"):
            assert names[p[i]] == "right_" + n[5:]
    assert p[0] == 0 and p[9] == 10 and p[33] == 33 and p[34] == 34


def test_unmirror_reflects_x_and_swaps_sides():
    raw = np.zeros((39, 5))
    raw[:, 0] = np.arange(39) + 10.0
    raw[:, 1] = np.arange(39) * 2.0
    out = unmirror_landmarks(raw)
    lw, rw = 15, 16
    assert out[lw, 0] == 256 - raw[rw, 0] and out[lw, 1] == raw[rw, 1]
    assert out[rw, 0] == 256 - raw[lw, 0]
    assert out[0, 0] == 256 - raw[0, 0]


def test_flip_disagreement_uses_the_swapped_side(tmp_path):
    """With constant outputs, the mirrored run's 'left wrist' is the right wrist reflected."""
    lm = np.zeros((39, 5))
    lm[:, :2] = 128.0
    lm[:, 3:] = 6.0
    lm[15, :2] = (90.0, 140.0)     # left wrist
    lm[16, :2] = (150.0, 140.0)    # right wrist: mirror of x = 106, not of the left wrist
    lm[11, :2] = (100.0, 60.0)     # shoulders and hips spread the points for the scale
    lm[12, :2] = (156.0, 60.0)
    lm[23, :2] = (110.0, 180.0)
    lm[24, :2] = (146.0, 180.0)
    a = LandmarkAdapter(COCO17, _contract_model(tmp_path / "m.onnx", lm), refine=False,
                        flip_average=False)
    region = Region(200, 200, 256, 256)
    r = a.predict(np.zeros((400, 400, 3), np.uint8), region)
    k = COCO17.index("left_wrist")
    pts = np.array([_frame_point(region, *lm[j, :2]) for j in
                    [BLAZEPOSE_LANDMARKS.index(n) for n in COCO17.keypoints]])
    ext = pts.max(0) - pts.min(0)
    scale = math.sqrt(ext[0] * ext[1])
    mirrored = _frame_point(region, 256 - 150.0, 140.0)
    expect = np.hypot(*(mirrored - pts[k])) / scale
    assert r.signals["flip_disagreement"][k] == pytest.approx(expect)
    assert r.signals["flip_disagreement"][COCO17.index("nose")] == pytest.approx(0.0, abs=1e-9)
    assert np.allclose(r.keypoints[:, :2], pts)
    # flip averaging reports the midpoint of the two predictions
    avg = LandmarkAdapter(COCO17, a.model_path, refine=False).predict(
        np.zeros((400, 400, 3), np.uint8), region)
    assert np.allclose(avg.keypoints[k, :2], (pts[k] + mirrored) / 2)


# -- the bundled model ----------------------------------------------------------------

@pytest.fixture(scope="module")
def bundled():
    if not BUNDLED.is_file():
        pytest.skip("bundled model not present")
    return LandmarkAdapter(COCO17)


@needs_bundled
def test_bundled_model_matches_model_json(bundled):
    desc = json.loads((BUNDLED.parent / "model.json").read_text())
    assert desc["adapter"] == "blazepose" and desc["file"] == BUNDLED.name
    assert bundled.model_hash == desc["sha256"]
    assert desc["input_size"] == [256, 256]


@needs_bundled
def test_predict_raw_batches_agree_with_single_crops(bundled):
    rng = np.random.default_rng(1)
    crops = rng.random((3, 256, 256, 3), dtype=np.float32)
    both = bundled.predict_raw(crops)
    assert both["landmarks"].shape == (3, 39, 5) and both["heatmaps"].shape == (3, 64, 64, 39)
    for i in range(3):
        one = bundled.predict_raw(crops[i:i + 1])
        assert np.allclose(one["landmarks"], both["landmarks"][i:i + 1], atol=1e-3)
    with pytest.raises(ValueError):
        bundled.predict_raw(crops[:, :128])


@needs_bundled
def test_embedding_is_unit_length_and_optional(bundled, tmp_path, monkeypatch):
    frame = np.random.default_rng(2).integers(0, 255, (240, 320, 3), dtype=np.uint8)
    r = bundled.predict(frame)
    assert bundled.embedding_tensor is not None
    assert r.embedding is not None and r.embedding.shape == (48,)
    assert np.linalg.norm(r.embedding) == pytest.approx(1.0, abs=1e-5)
    monkeypatch.setitem(sys.modules, "onnx", None)
    plain = LandmarkAdapter(COCO17, BUNDLED, flip=False)
    assert plain.embedding_tensor is None
    r2 = plain.predict(frame)
    assert r2.embedding is None and r2.keypoints.shape == (17, 3)


def _synth_available():
    try:
        from kinemark.core.synth import render_scenario  # noqa: F401
    except ImportError:
        return False
    return True


@pytest.fixture(scope="module")
def rendered(tmp_path_factory):
    if not _synth_available():
        pytest.skip("kinemark.core.synth.render_scenario is not written yet: the check of the "
                    "bundled model on rendered figures cannot run")
    from kinemark.core.synth import render_scenario
    out = tmp_path_factory.mktemp("synth")
    render_scenario(out, seed=7, size="tiny")
    return out


@needs_bundled
def test_bundled_model_finds_rendered_people_coco_ap(bundled, rendered):
    """Keypoint AP of the bundled model on the renderer's figures, by pycocotools COCOeval.

    Measured on this machine (seed 7, size "tiny": 2 clips, 65 frames, 320x240):
    pooled AP 0.49 with the default pipeline (DARK decoding; 0.45 with the
    windowed refinement). The floor sits well below that so only a
    real regression (wrong coordinate mapping, wrong crop, broken model) fails;
    a pipeline that maps points to the wrong place scores near 0.
    """
    from pycocotools.coco import COCO
    from pycocotools.cocoeval import COCOeval

    ap, n = _evaluate_on_renders(bundled, rendered, COCO, COCOeval)
    assert n >= 20, "too few rendered frames were evaluated"
    assert ap >= AP_FLOOR, f"keypoint AP {ap:.3f} is below the floor {AP_FLOOR}"


AP_FLOOR = 0.3


@needs_bundled
def test_prepare_crop_with_its_mirror_is_the_crop_and_the_crop_reversed_left_right(bundled, rendered):
    """The one-batch crop and mirror hold exactly the single crop and its columns reversed
    (the mirror image the flip test needs), scaled to [0, 1] as the model expects."""
    frame = _read_frames(sorted(rendered.glob("*.mp4"))[0])[3]
    reg = Region(150.0, 110.0, 140.0, 140.0, 0.3, "drawn")
    one = bundled.prepare_crop(frame, reg)
    both = bundled.prepare_crop(frame, reg, mirror=True)
    assert one.shape == (256, 256, 3) and both.shape == (2, 256, 256, 3) and both.dtype == np.float32
    np.testing.assert_array_equal(both[0], one)
    np.testing.assert_array_equal(both[1], one[:, ::-1])
    assert 0.0 <= one.min() and one.max() <= 1.0 and one.max() > 0.1


def test_bundled_model_on_a_rendered_person_flip_and_presence(bundled, rendered):
    """On a rendered person: the left/right swap is what makes the mirrored run agree."""
    video = sorted(rendered.glob("*.mp4"))[0]
    frames = _read_frames(video)
    frame = frames[len(frames) // 2]
    r = bundled.predict(frame)
    reg = r.region
    crop = bundled.prepare_crop(frame, reg)
    raw = bundled.predict_raw(np.stack([crop, crop[:, ::-1]]))
    normal, mirrored = raw["landmarks"][0], raw["landmarks"][1]
    swapped = unmirror_landmarks(mirrored)
    unswapped = mirrored.copy()
    unswapped[:, 0] = 256 - unswapped[:, 0]
    body = [11, 12, 13, 14, 15, 16, 23, 24, 25, 26, 27, 28]
    d_swap = np.hypot(*(swapped[body, :2] - normal[body, :2]).T).mean()
    d_raw = np.hypot(*(unswapped[body, :2] - normal[body, :2]).T).mean()
    assert d_swap < 0.5 * d_raw
    # a person is present here; a black frame has none
    blank = bundled.predict_raw(np.zeros((1, 256, 256, 3), np.float32))["pose_flag"][0]
    assert raw["pose_flag"][0] > 0.5 > blank
    assert r.score > 0.3


def _evaluate_on_renders(adapter, folder, COCO, COCOeval):
    """Pooled keypoint AP over all rendered clips (one COCO set, image ids made unique)."""
    import contextlib
    import io

    images, anns, results, categories = [], [], [], None
    for ann_path in sorted(folder.glob("*.coco.json")):
        doc = json.loads(ann_path.read_text())
        categories = doc["categories"]
        video = ann_path.with_name(ann_path.name[: -len(".coco.json")] + ".mp4")
        frames = _read_frames(video)
        base = len(images)
        remap = {}
        for img in doc["images"]:
            idx = img.get("frame_index", img["id"] - 1)
            if idx >= len(frames):
                continue
            new_id = base + len(remap) + 1
            remap[img["id"]] = new_id
            images.append(dict(img, id=new_id))
            r = adapter.predict(frames[idx])
            results.append({"image_id": new_id, "category_id": 1,
                            "keypoints": [float(v) for v in r.keypoints.reshape(-1)],
                            "score": float(r.score)})
        for a in doc["annotations"]:
            if a["image_id"] in remap:
                anns.append(dict(a, id=len(anns) + 1, image_id=remap[a["image_id"]]))
    if not results:
        return 0.0, 0
    with contextlib.redirect_stdout(io.StringIO()):
        gt = COCO()
        gt.dataset = {"images": images, "annotations": anns, "categories": categories}
        gt.createIndex()
        dt = gt.loadRes(results)
        ev = COCOeval(gt, dt, "keypoints")
        ev.evaluate()
        ev.accumulate()
        ev.summarize()
    return float(ev.stats[0]), len(results)


def _read_frames(path):
    cap = cv2.VideoCapture(str(path))
    frames = []
    while True:
        ok, f = cap.read()
        if not ok:
            break
        frames.append(f)
    cap.release()
    return frames


def test_degenerate_drawn_region_is_a_user_error(tmp_path):
    a = LandmarkAdapter(COCO17, _contract_model(tmp_path / "m.onnx", np.zeros((39, 5))))
    with pytest.raises(KinemarkError, match="too small"):
        a.predict(np.zeros((100, 100, 3), np.uint8), Region(50, 50, 0, 40))


# -- heatmap refinement (the refinement step the published MediaPipe pose pipeline
# runs after its landmark model: a 7 x 7 window, minimum confidence 0.5) -----------

def _refine_one_point_at_a_time(lm, hm, kernel=7, min_confidence=0.5):
    """The same step written as the plain per-point slice, as a reference."""
    out = lm.copy()
    h, w = hm.shape[:2]
    stride = 256 / w
    half = kernel // 2
    for j in range(33):
        col, row = int(np.floor(lm[j, 0] / stride)), int(np.floor(lm[j, 1] / stride))
        if not (0 <= col < w and 0 <= row < h):
            continue
        r0, r1 = max(0, row - half), min(h, row + half + 1)
        c0, c1 = max(0, col - half), min(w, col + half + 1)
        win = 1.0 / (1.0 + np.exp(-hm[r0:r1, c0:c1, j].astype(np.float64)))
        if win.max() < min_confidence:
            continue
        rr, cc = np.mgrid[r0:r1, c0:c1]
        out[j, 0] = ((win * cc).sum() / win.sum() + 0.5) * stride
        out[j, 1] = ((win * rr).sum() / win.sum() + 0.5) * stride
    return out


def test_refine_batch_matches_the_per_point_slice():
    rng = np.random.default_rng(4)
    lms = rng.uniform(-20, 276, size=(3, 39, 5))        # some points off the map
    hms = rng.normal(-1.0, 3.0, size=(3, 64, 64, 39)).astype(np.float32)
    got = lmk._refine(lms, hms)
    for b in range(3):
        want = _refine_one_point_at_a_time(lms[b], hms[b])
        np.testing.assert_allclose(got[b], want, rtol=0, atol=1e-9)
        np.testing.assert_allclose(lmk._refine(lms[b], hms[b]), want, rtol=0, atol=1e-9)
    assert not np.allclose(got[:, :33, :2], lms[:, :33, :2])   # it really moved points


def test_refine_finds_the_centre_of_a_symmetric_blob():
    # the weighted mean of a distribution symmetric about a point is that point
    # (handbook fact); here a blob centred on heatmap cell (20, 30), i.e. input pixel
    # centre (4 * 30 + 2, 4 * 20 + 2) under the cell convention the docstring names
    yy, xx = np.mgrid[0:64, 0:64]
    blob = 8.0 * np.exp(-((xx - 30) ** 2 + (yy - 20) ** 2) / 4.0) - 4.0
    hm = np.repeat(blob[:, :, None], 39, axis=2).astype(np.float32)
    lm = np.zeros((39, 5))
    # regressed inside the peak's cell but off its centre: the window is then centred
    # on the peak, and the weighted mean moves the point to the cell centre
    lm[:, 0], lm[:, 1] = 4 * 30 + 0.3, 4 * 20 + 3.6
    out = lmk._refine(lm, hm)
    np.testing.assert_allclose(out[:33, 0], 4 * 30 + 2, atol=1e-9)
    np.testing.assert_allclose(out[:33, 1], 4 * 20 + 2, atol=1e-9)
    np.testing.assert_array_equal(out[33:], lm[33:])    # auxiliary points are not refined


def test_dark_points_put_body_points_at_the_heatmap_peaks():
    """Gaussian peaks at known sub-pixel cells (sigma 2, DARK's default; Zhang et al. 2020
    show DARK recovers such centres) land at input pixel 4 (c + 0.5), the cell convention
    of the docstring; channels not asked for, flat channels and auxiliary points keep
    the regressed position."""
    yy, xx = np.mgrid[0:64, 0:64]
    rng = np.random.default_rng(8)
    centres = rng.uniform(8, 56, size=(2, 39, 2))
    logit = np.empty((2, 64, 64, 39), np.float32)
    for b in range(2):
        for c in range(39):
            cx, cy = centres[b, c]
            p = 0.95 * np.exp(-((xx - cx) ** 2 + (yy - cy) ** 2) / (2 * 2.0 ** 2)) + 1e-4
            logit[b, :, :, c] = np.log(p / (1 - p))
    logit[1, :, :, 5] = 0.0                               # flat: no peak
    lm = rng.uniform(0, 256, size=(2, 39, 5))
    channels = np.array([0, 5, 11, 12, 25])
    out = lmk._dark_points(lm, logit, channels)
    for b in range(2):
        for c in channels:
            if (b, c) == (1, 5):
                np.testing.assert_array_equal(out[b, c], lm[b, c])
                continue
            np.testing.assert_allclose(out[b, c, :2], 4 * (centres[b, c] + 0.5), atol=4 * 0.05)
            np.testing.assert_array_equal(out[b, c, 2:], lm[b, c, 2:])
        others = np.setdiff1d(np.arange(39), channels)
        np.testing.assert_array_equal(out[b, others], lm[b, others])


def test_heatmap_decode_choices(tmp_path):
    with pytest.raises(ValueError, match="heatmap_decode"):
        LandmarkAdapter(COCO17, BUNDLED, heatmap_decode="argmax")


def test_pass_disagreement_uses_the_regressed_points_and_only_the_final_pass_is_decoded(tmp_path, monkeypatch):
    lm = np.zeros((39, 5))
    lm[:, :2] = np.random.default_rng(2).uniform(60, 200, (39, 2))
    lm[lmk.AUX_HIP_CENTRE, :2] = (128, 150)
    lm[lmk.AUX_SCALE_POINT, :2] = (128, 60)
    lm[:, 3:] = 4.0
    yy, xx = np.mgrid[0:64, 0:64]
    heat = np.repeat((8.0 * np.exp(-((xx - 20) ** 2 + (yy - 30) ** 2) / 8.0) - 4.0)[:, :, None], 39, axis=2)
    a = LandmarkAdapter(COCO17, _contract_model(tmp_path / "m.onnx", lm, heat=heat), flip=False, passes=2)
    decoded = []
    real = lmk._dark_points
    monkeypatch.setattr(lmk, "_dark_points", lambda *args, **kw: decoded.append(1) or real(*args, **kw))
    frame = np.zeros((240, 320, 3), np.uint8)
    r = a.predict(frame)
    assert len(decoded) == 1                       # the final pass only
    # the heatmap moved the final points to its peak ...
    peak = lmk.model_to_frame(np.array([[4 * 20.5, 4 * 30.5]]), r.region)[0]
    k = COCO17.keypoints.index("left_wrist")
    assert r.keypoints[k, :2] == pytest.approx(peak, abs=0.5)
    # ... but the disagreement compares the two passes' regressed points
    first = lmk.whole_frame_region(320, 240)
    j = lmk.landmark_index_for("left_wrist")
    d = np.hypot(*(lmk.model_to_frame(lm[[j], :2], first)[0] - lmk.model_to_frame(lm[[j], :2], r.region)[0]))
    ext = r.keypoints[:, :2].max(axis=0) - r.keypoints[:, :2].min(axis=0)   # every point decoded to one peak
    scale = np.sqrt(max(ext[0] * ext[1], 1.0))       # the module's scale, floored at 1 px
    assert d > 10 and r.signals["pass_disagreement"][k] == pytest.approx(d / scale, rel=1e-6)
    # the regression head's own final points travel with the proposal (for the correction)
    reg_final = lmk.model_to_frame(lm[[j], :2], r.region)[0]
    assert (r.signals["regressed_x"][k], r.signals["regressed_y"][k]) == pytest.approx(tuple(reg_final))
    assert np.hypot(*(reg_final - r.keypoints[k, :2])) > 1.0      # not the decoded point
