"""HeatmapAdapter against tiny ONNX models built here with onnx.helper.

The models are exact by construction: one emits fixed Gaussian heatmaps at
chosen sub-pixel cells (so the expected frame positions follow from the
region geometry alone), the others are a single strided convolution that
averages 4x4 input blocks, so a bright blob in the frame shows up as a peak
at a known place. Expected frame positions are computed here from the
definitions (region docstring in kinemark.core.pose.base, the stride and
pixel-centre convention in kinemark.core.pose.heatmap), not by calling the
adapter's own geometry code.
"""
import json
import math

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper

from kinemark.core.errors import KinemarkError
from kinemark.core.pose.base import Region, file_sha256
from kinemark.core.pose.heatmap import HeatmapAdapter, HeatmapModelConfig, config_path_for
from kinemark.core.skeleton import COCO17, Skeleton

IW, IH, STRIDE = 192, 256, 4
HW, HH = IW // STRIDE, IH // STRIDE


# -- model builders ---------------------------------------------------------

def _save(path, nodes, inits, batch="N", out_channels=None, opset=17):
    inp = helper.make_tensor_value_info("image", TensorProto.FLOAT, [batch, 3, IH, IW])
    out = helper.make_tensor_value_info("heatmaps", TensorProto.FLOAT,
                                        [batch, out_channels, HH, HW])
    graph = helper.make_graph(nodes, "test", [inp], [out], initializer=inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", opset)])
    model.ir_version = 8
    onnx.checker.check_model(model)
    onnx.save(model, str(path))
    return path


def constant_model(path, heatmaps, batch="N"):
    """Outputs ``heatmaps`` (K, HH, HW) whatever the image (0 * mean(image) keeps the batch)."""
    k = heatmaps.shape[0]
    inits = [numpy_helper.from_array(heatmaps[None].astype(np.float32), "hm"),
             numpy_helper.from_array(np.zeros((), np.float32), "zero")]
    nodes = [helper.make_node("ReduceMean", ["image"], ["m"], axes=[1, 2, 3], keepdims=1),
             helper.make_node("Mul", ["m", "zero"], ["z"]),
             helper.make_node("Add", ["hm", "z"], ["heatmaps"])]
    return _save(path, nodes, inits, batch=batch, out_channels=k)


def pooling_model(path, channel_weights, ramp=None, batch="N"):
    """Heatmap k = mean over each 4x4 input block of sum_c w[k, c] * image[c].

    ``ramp`` (K, HH, HW), if given, multiplies the heatmaps (a model that is
    not mirror-symmetric).
    """
    w = np.asarray(channel_weights, np.float32)
    k = w.shape[0]
    kern = np.repeat(np.repeat(w[:, :, None, None], STRIDE, 2), STRIDE, 3) / STRIDE ** 2
    inits = [numpy_helper.from_array(kern.astype(np.float32), "w")]
    if ramp is None:
        nodes = [helper.make_node("Conv", ["image", "w"], ["heatmaps"],
                                  kernel_shape=[STRIDE, STRIDE], strides=[STRIDE, STRIDE])]
    else:
        inits.append(numpy_helper.from_array(ramp[None].astype(np.float32), "ramp"))
        nodes = [helper.make_node("Conv", ["image", "w"], ["c"],
                                  kernel_shape=[STRIDE, STRIDE], strides=[STRIDE, STRIDE]),
                 helper.make_node("Mul", ["c", "ramp"], ["heatmaps"])]
    return _save(path, nodes, inits, batch=batch, out_channels=k)


def write_config(model_path, names, **over):
    cfg = {
        "kinemark_heatmap_model": 1,
        "input": {"name": "image", "width": IW, "height": IH, "colour_order": "RGB",
                  "pixel_units": "0-255", "mean": [0.0, 0.0, 0.0], "std": [255.0, 255.0, 255.0]},
        "output": {"name": "heatmaps", "stride": STRIDE, "sigma": 2.0},
        "keypoints": list(names),
    }
    for key, val in over.items():
        if isinstance(val, dict) and isinstance(cfg.get(key), dict):
            cfg[key].update(val)
        else:
            cfg[key] = val
    p = config_path_for(model_path)
    p.write_text(json.dumps(cfg))
    return p


def gaussian(cx, cy, h=HH, w=HW, sigma=2.0, amp=1.0):
    yy, xx = np.mgrid[0:h, 0:w]
    return amp * np.exp(-((xx - cx) ** 2 + (yy - cy) ** 2) / (2 * sigma ** 2))


def blob_frame(h, w, blobs, sigma=8.0):
    """BGR uint8 frame; blobs: list of (x, y, (b, g, r) peak values)."""
    yy, xx = np.mgrid[0:h, 0:w]
    img = np.zeros((h, w, 3))
    for x, y, bgr in blobs:
        g = np.exp(-((xx - x) ** 2 + (yy - y) ** 2) / (2 * sigma ** 2))
        img += g[:, :, None] * np.asarray(bgr, float)
    return np.clip(np.round(img), 0, 255).astype(np.uint8)


def expected_frame_xy(region, cells):
    """Heatmap cells -> frame pixels, straight from the definitions.

    cell i has its centre at input pixel (i + 0.5) * stride - 0.5; input pixel
    u spans [u - 0.5, u + 0.5] and the input's IW pixels span the region's
    width, whose x axis points along (cos a, sin a) (Region docstring).
    """
    cells = np.asarray(cells, float)
    u = (cells + 0.5) * STRIDE - 0.5
    fx = ((u[:, 0] + 0.5) / IW - 0.5) * region.w
    fy = ((u[:, 1] + 0.5) / IH - 0.5) * region.h
    c, s = math.cos(region.angle), math.sin(region.angle)
    return np.column_stack([region.cx + c * fx - s * fy, region.cy + s * fx + c * fy])


FACE = ["nose", "left_eye", "right_eye"]


@pytest.fixture
def face_model(tmp_path):
    cells = np.array([[12.37, 20.81], [30.2, 40.6], [20.55, 50.1]])
    amps = np.array([0.9, 0.6, 0.2])
    hm = np.stack([gaussian(x, y, amp=a) for (x, y), a in zip(cells, amps)])
    path = constant_model(tmp_path / "face.onnx", hm)
    write_config(path, FACE)
    return path, cells, hm


# -- positions through the affine -------------------------------------------

def test_predict_maps_known_subpixel_peaks_to_frame_pixels(face_model):
    path, cells, hm = face_model
    ad = HeatmapAdapter(path, COCO17, flip_test=False, confidence_threshold=0.3)
    frame = np.zeros((720, 640, 3), np.uint8)
    region = Region(400.3, 300.7, 180.0, 260.0, 0.3, "drawn")
    res = ad.predict(frame, region)
    # the region is grown to the input's aspect (192/256) before cropping
    assert res.region.w == pytest.approx(260.0 * IW / IH) and res.region.h == pytest.approx(260.0)
    exp = expected_frame_xy(res.region, cells)
    idx = [COCO17.index(n) for n in FACE]
    np.testing.assert_allclose(res.keypoints[idx, :2], exp, atol=0.05)
    peak = hm.reshape(3, -1).max(axis=1)
    np.testing.assert_allclose(res.confidence[idx], peak, atol=1e-6)
    assert res.keypoints[idx, 2].tolist() == [2.0, 2.0, 1.0]    # 0.2 < threshold 0.3
    others = [i for i in range(17) if i not in idx]
    assert (res.keypoints[others] == 0).all() and (res.confidence[others] == 0).all()
    assert np.isnan(res.signals["heatmap_entropy"][others]).all()
    assert res.signals["heatmap_entropy"][idx].tolist() == [0.0, 0.0, 0.0]
    assert np.isnan(res.signals["flip_disagreement"]).all()      # flip test off
    assert res.score == pytest.approx(peak.mean())
    assert ad.covered().tolist() == [n in FACE for n in COCO17.keypoints]
    assert ad.model_hash == file_sha256(path)
    assert ad.describe()["keypoints"] == FACE


def test_points_outside_the_frame_get_v0(face_model):
    path, cells, hm = face_model
    ad = HeatmapAdapter(path, COCO17, flip_test=False)
    frame = np.zeros((200, 300, 3), np.uint8)
    idx = np.array([COCO17.index(n) for n in FACE])
    # region hanging off the right edge: the second point lands outside
    region = Region(290.0, 100.0, 192.0, 256.0)
    res = ad.predict(frame, region)
    exp = expected_frame_xy(res.region, cells)
    inside = (exp[:, 0] <= 299.5) & (exp[:, 1] >= -0.5) & (exp[:, 1] <= 199.5)
    assert inside.tolist() == [True, False, True]
    assert res.keypoints[idx[0], 2] == 2.0 and res.keypoints[idx[2], 2] == 1.0
    np.testing.assert_allclose(res.keypoints[idx[[0, 2]], :2], exp[[0, 2]], atol=0.05)
    assert res.keypoints[idx[1]].tolist() == [0.0, 0.0, 0.0]
    assert res.confidence[idx[1]] == pytest.approx(hm[1].max())  # confidence is kept


def test_whole_frame_letterbox_when_no_region(face_model):
    path, cells, _ = face_model
    ad = HeatmapAdapter(path, COCO17, flip_test=False)
    frame = np.zeros((300, 500, 3), np.uint8)
    res = ad.predict(frame)
    # square side max(w, h) centred on the frame, then grown to 192:256
    assert (res.region.cx, res.region.cy) == (249.5, 149.5)
    assert res.region.w == pytest.approx(500.0) and res.region.h == pytest.approx(500.0 * IH / IW)
    exp = expected_frame_xy(res.region, cells[:1])
    np.testing.assert_allclose(res.keypoints[0, :2], exp[0], atol=0.05)


def test_region_from_previous_pose(face_model):
    path, _, _ = face_model
    ad = HeatmapAdapter(path, COCO17, flip_test=False, margin=0.25)
    prev = np.zeros((17, 3))
    prev[5] = [100, 200, 2]
    prev[12] = [180, 400, 1]
    prev[0] = [900, 900, 0]            # not labelled: ignored
    res = ad.predict(np.zeros((600, 600, 3), np.uint8), previous=prev)
    assert res.region.source == "neighbour"
    assert (res.region.cx, res.region.cy) == (140.0, 300.0)
    # box 80 x 200, plus 25 %, then grown to 192:256
    assert res.region.h == pytest.approx(250.0)
    assert res.region.w == pytest.approx(250.0 * IW / IH)
    one = np.zeros((17, 3))
    one[3] = [10, 10, 2]
    assert ad.predict(np.zeros((100, 100, 3), np.uint8), previous=one).region.source == "frame"


def test_stride_and_pixel_centre_convention_on_a_real_blob(tmp_path):
    # 1:1 crop (region = frame): a blob at a sub-pixel frame position must come
    # back there (measured error ~0.002 px, from 8-bit rounding of the frame). Taking cell i's centre at i * stride instead of
    # (i + 0.5) * stride - 0.5 would be off by 1.5 px.
    path = pooling_model(tmp_path / "grey.onnx", [[1 / 3, 1 / 3, 1 / 3]])
    write_config(path, ["nose"], output={"sigma": 2.0})
    ad = HeatmapAdapter(path, COCO17, flip_test=False)
    frame = blob_frame(IH, IW, [(70.3, 150.8, (255, 255, 255))])
    res = ad.predict(frame, Region((IW - 1) / 2, (IH - 1) / 2, IW, IH))
    np.testing.assert_allclose(res.keypoints[0, :2], [70.3, 150.8], atol=0.05)
    assert res.confidence[0] > 0.8


def test_colour_order_is_honoured(tmp_path):
    # a model that looks at its input's channel 0 only
    path = pooling_model(tmp_path / "c0.onnx", [[1.0, 0.0, 0.0]])
    red_at, blue_at = (60.0, 80.0), (130.0, 190.0)
    frame = blob_frame(IH, IW, [(*red_at, (0, 0, 255)), (*blue_at, (255, 0, 0))])
    region = Region((IW - 1) / 2, (IH - 1) / 2, IW, IH)
    write_config(path, ["nose"], input={"colour_order": "RGB"})
    rgb = HeatmapAdapter(path, COCO17, flip_test=False).predict(frame, region)
    np.testing.assert_allclose(rgb.keypoints[0, :2], red_at, atol=0.05)
    write_config(path, ["nose"], input={"colour_order": "BGR"})
    bgr = HeatmapAdapter(path, COCO17, flip_test=False).predict(frame, region)
    np.testing.assert_allclose(bgr.keypoints[0, :2], blue_at, atol=0.05)


def test_preprocess_units_are_explicit(tmp_path):
    path = constant_model(tmp_path / "m.onnx", np.stack([gaussian(20, 30)]))
    crop = np.random.default_rng(0).integers(0, 256, (IH, IW, 3), dtype=np.uint8)
    rgb = crop[:, :, ::-1].astype(np.float64)
    mean255, std255 = np.array([123.675, 116.28, 103.53]), np.array([58.395, 57.12, 57.375])
    write_config(path, ["nose"], input={"pixel_units": "0-255", "mean": list(mean255),
                                        "std": list(std255)})
    x = HeatmapAdapter(path, COCO17).preprocess(crop)
    assert x.shape == (3, IH, IW) and x.dtype == np.float32
    np.testing.assert_allclose(x, ((rgb - mean255) / std255).transpose(2, 0, 1), atol=1e-4)
    write_config(path, ["nose"], input={"pixel_units": "0-1", "mean": list(mean255 / 255),
                                        "std": list(std255 / 255)})
    y = HeatmapAdapter(path, COCO17).preprocess(crop)
    np.testing.assert_allclose(y, x, atol=1e-4)   # the same normalisation in other units


def test_predict_raw_shapes_with_fixed_and_free_batch(tmp_path):
    hm = np.stack([gaussian(20, 30), gaussian(10, 10)])
    for batch in ("N", 1):
        path = constant_model(tmp_path / f"b{batch}.onnx", hm, batch=batch)
        write_config(path, ["nose", "left_eye"])
        ad = HeatmapAdapter(path, COCO17)
        out = ad.predict_raw(np.zeros((3, 3, IH, IW), np.float32))
        assert out.shape == (3, 2, HH, HW)
        np.testing.assert_allclose(out[2], hm, atol=1e-6)
        res = ad.predict(np.zeros((300, 300, 3), np.uint8))   # flip test runs 2 crops
        assert res.keypoints.shape == (17, 3)


# -- flip test-time augmentation --------------------------------------------

def test_flip_disagreement_is_zero_for_a_mirror_symmetric_model(tmp_path):
    path = pooling_model(tmp_path / "sym.onnx", [[1 / 3, 1 / 3, 1 / 3]])
    write_config(path, ["nose"])
    ad = HeatmapAdapter(path, COCO17, flip_test=True)
    frame = blob_frame(IH, IW, [(70.3, 150.8, (255, 255, 255))])
    res = ad.predict(frame, Region((IW - 1) / 2, (IH - 1) / 2, IW, IH))
    assert res.signals["flip_disagreement"][0] < 1e-4
    np.testing.assert_allclose(res.keypoints[0, :2], [70.3, 150.8], atol=0.05)


def test_flip_disagreement_measures_an_asymmetric_model(tmp_path):
    # Heatmap times exp(a * column): a Gaussian of variance s2 (cells^2) times
    # exp(a x) is the same Gaussian moved by a * s2 cells to the right. The
    # mirrored pass moves it right in mirrored coordinates, i.e. left after
    # un-mirroring, so the two passes differ by 2 a s2 cells = 2 a s2 * stride px.
    a = 0.05
    ramp = np.exp(a * np.arange(HW))[None, None, :].repeat(HH, 1)
    path = pooling_model(tmp_path / "asym.onnx", [[1 / 3, 1 / 3, 1 / 3]], ramp=ramp[:, :, :])
    write_config(path, ["nose"])
    ad = HeatmapAdapter(path, COCO17, flip_test=True)
    blob_sigma = 8.0
    frame = blob_frame(IH, IW, [(90.0, 128.0, (200, 200, 200))], sigma=blob_sigma)
    region = Region((IW - 1) / 2, (IH - 1) / 2, IW, IH)
    res = ad.predict(frame, region)
    # variance in cells: the blob's, plus that of the 4-px box average ((4^2 - 1) / 12 px^2)
    s2 = (blob_sigma ** 2 + (STRIDE ** 2 - 1) / 12) / STRIDE ** 2
    expected_px = 2 * a * s2 * STRIDE
    scale = math.sqrt(region.w * region.h)   # one point: its box has no area, the region's is used
    assert res.signals["flip_disagreement"][0] * scale == pytest.approx(expected_px, rel=0.01)
    # the averaged heatmaps put the point between the two passes (+-0.8 px),
    # near the blob; not exactly on it, as the ramp makes one pass's peak higher
    assert abs(res.keypoints[0, 0] - 90.0) < 0.1


def test_flip_swaps_left_and_right(tmp_path):
    # left_wrist reads the red channel, right_wrist the green one (model's RGB
    # order). Colour does not mirror, so after un-mirroring and the left/right
    # swap the mirrored pass puts each wrist on the other's blob: disagreement
    # = blob distance / scale. Without the swap it would be zero.
    path = pooling_model(tmp_path / "lr.onnx", [[1.0, 0.0, 0.0], [0.0, 1.0, 0.0]])
    write_config(path, ["left_wrist", "right_wrist"])
    ad = HeatmapAdapter(path, COCO17, flip_test=True)
    red, green = (60.0, 100.0), (140.0, 160.0)
    frame = blob_frame(IH, IW, [(*red, (0, 0, 255)), (*green, (0, 200, 0))])
    region = Region((IW - 1) / 2, (IH - 1) / 2, IW, IH)
    res = ad.predict(frame, region)
    li, ri = COCO17.index("left_wrist"), COCO17.index("right_wrist")
    # averaged heatmaps: both wrists on the brighter (red) blob, so the points'
    # box has no area and the region sets the scale
    np.testing.assert_allclose(res.keypoints[li, :2], red, atol=0.05)
    np.testing.assert_allclose(res.keypoints[ri, :2], red, atol=0.05)
    dist = math.dist(red, green)
    scale = math.sqrt(region.w * region.h)
    np.testing.assert_allclose(res.signals["flip_disagreement"][[li, ri]], dist / scale, rtol=0.005)


def test_config_flip_pairs_override_names(tmp_path):
    # names that do not follow left_/right_: the config's pairs are used
    path = pooling_model(tmp_path / "lr.onnx", [[1.0, 0.0, 0.0], [0.0, 1.0, 0.0]])
    sk = Skeleton("hands", ("hand_l", "hand_r"), ((0, 1),), ((0, 1),), (0.06, 0.06))
    frame = blob_frame(IH, IW, [(60.0, 100.0, (0, 0, 255)), (140.0, 160.0, (0, 200, 0))])
    region = Region((IW - 1) / 2, (IH - 1) / 2, IW, IH)
    write_config(path, ["hand_l", "hand_r"])
    unpaired = HeatmapAdapter(path, sk).predict(frame, region)
    assert unpaired.signals["flip_disagreement"].max() < 1e-4
    write_config(path, ["hand_l", "hand_r"], flip_pairs=[["hand_l", "hand_r"]])
    paired = HeatmapAdapter(path, sk).predict(frame, region)
    assert paired.signals["flip_disagreement"].min() > 0.3


# -- bad inputs -------------------------------------------------------------

def test_missing_model_file(tmp_path):
    with pytest.raises(KinemarkError, match="model file not found"):
        HeatmapAdapter(tmp_path / "nothing.onnx", COCO17)


def test_truncated_and_corrupt_model_files(tmp_path, face_model):
    path, _, _ = face_model
    data = path.read_bytes()
    bad = tmp_path / "cut.onnx"
    bad.write_bytes(data[: len(data) // 2])
    config_path_for(bad).write_text(config_path_for(path).read_text())
    with pytest.raises(KinemarkError, match="cannot load the ONNX model"):
        HeatmapAdapter(bad, COCO17)
    bad.write_bytes(b"this is not a model" * 10)
    with pytest.raises(KinemarkError, match="cannot load the ONNX model"):
        HeatmapAdapter(bad, COCO17)


def test_missing_config(tmp_path):
    path = constant_model(tmp_path / "m.onnx", np.stack([gaussian(20, 30)]))
    with pytest.raises(KinemarkError, match=r"m\.kinemark\.json.*not found"):
        HeatmapAdapter(path, COCO17)


def test_malformed_config_json(tmp_path):
    path = constant_model(tmp_path / "m.onnx", np.stack([gaussian(20, 30)]))
    config_path_for(path).write_text('{"kinemark_heatmap_model": 1, "input": {')
    with pytest.raises(KinemarkError, match="not valid JSON.*line 1"):
        HeatmapAdapter(path, COCO17)


def test_keypoint_count_must_match_output_channels(tmp_path):
    path = constant_model(tmp_path / "m.onnx", np.stack([gaussian(20, 30)] * 3))
    write_config(path, ["nose", "left_eye"])
    with pytest.raises(KinemarkError, match="3 heatmap channels.*lists 2 keypoints.*'keypoints'"):
        HeatmapAdapter(path, COCO17)


def test_input_size_must_match(tmp_path):
    path = constant_model(tmp_path / "m.onnx", np.stack([gaussian(20, 30)]))
    write_config(path, ["nose"], input={"width": 256, "height": 192})
    with pytest.raises(KinemarkError, match="input.width"):
        HeatmapAdapter(path, COCO17)


def test_stride_must_match_output(tmp_path):
    path = constant_model(tmp_path / "m.onnx", np.stack([gaussian(20, 30)]))
    write_config(path, ["nose"], output={"stride": 8})
    with pytest.raises(KinemarkError, match="output.stride"):
        HeatmapAdapter(path, COCO17)


def test_unknown_input_and_output_names(tmp_path):
    path = constant_model(tmp_path / "m.onnx", np.stack([gaussian(20, 30)]))
    write_config(path, ["nose"], input={"name": "pixels"})
    with pytest.raises(KinemarkError, match="no input 'pixels'.*image"):
        HeatmapAdapter(path, COCO17)
    write_config(path, ["nose"], output={"name": "maps"})
    with pytest.raises(KinemarkError, match="no output 'maps'.*heatmaps"):
        HeatmapAdapter(path, COCO17)


@pytest.mark.parametrize("over, field", [
    ({"kinemark_heatmap_model": 2}, "kinemark_heatmap_model"),
    ({"input": {"colour_order": "RGBA"}}, "input.colour_order"),
    ({"input": {"pixel_units": "uint8"}}, "input.pixel_units"),
    ({"input": {"mean": [0, 0]}}, "input.mean"),
    ({"input": {"std": [1, 0, 1]}}, r"input.std\[1\]"),
    ({"input": {"width": "192"}}, "input.width"),
    ({"output": {"stride": 0}}, "output.stride"),
    ({"output": {"stride": 5}}, "output.stride"),
    ({"output": {"sigma": -1}}, "output.sigma"),
    ({"keypoints": []}, "keypoints"),
    ({"keypoints": ["nose", "nose"]}, "keypoints"),
    ({"flip_pairs": [["nose", "tail"]]}, r"flip_pairs\[0\]\[1\]"),
    ({"flip_pairs": [["nose"]]}, r"flip_pairs\[0\]"),
])
def test_bad_config_fields_are_named(tmp_path, over, field):
    path = constant_model(tmp_path / "m.onnx", np.stack([gaussian(20, 30)]))
    write_config(path, ["nose"], **over)
    with pytest.raises(KinemarkError, match=f"field '{field}'"):
        HeatmapAdapter(path, COCO17)


def test_config_must_be_an_object():
    with pytest.raises(KinemarkError, match="JSON object"):
        HeatmapModelConfig([1, 2, 3])


def test_skeleton_without_common_keypoints_lists_names(tmp_path):
    path = constant_model(tmp_path / "m.onnx", np.stack([gaussian(20, 30)] * 2))
    write_config(path, ["snout", "tail_tip"])
    with pytest.raises(KinemarkError, match="share no name.*snout, tail_tip.*nose, left_eye"):
        HeatmapAdapter(path, COCO17)


def test_region_without_area(face_model):
    path, _, _ = face_model
    ad = HeatmapAdapter(path, COCO17)
    with pytest.raises(KinemarkError, match="no area"):
        ad.predict(np.zeros((100, 100, 3), np.uint8), Region(50, 50, 0.0, 20.0))
