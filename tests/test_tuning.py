"""Network tuning (core.tuning): the heatmap decoder re-trained on a project's labels.

Outside references: ONNX Runtime (the registry's onnxruntime, which runs the shipped model) for
what the decoder computes and for the patched model; the bundled model's own decoding for the
round trip of the training targets. The planted offset and the rendered clips are invented test
data (the Quillon Bay scenario's test-size set).
"""
from __future__ import annotations

import hashlib
import os
import shutil
import sys

import numpy as np
import pytest

from kinemark.core.errors import KinemarkError

try:
    import torch
except ImportError:                  # the test extra installs it; in CI a missing one is a failure
    if os.environ.get("CI"):
        raise
    pytest.skip("network tuning needs PyTorch (pip install -e '.[test]')", allow_module_level=True)
import onnx  # noqa: E402
import onnxruntime as ort  # noqa: E402

from kinemark.core import tuning as T  # noqa: E402
from kinemark.core.model import ACCEPTED, DRAFTING  # noqa: E402
from kinemark.core.pose import landmark as L  # noqa: E402
from kinemark.core.pose.base import session_options  # noqa: E402

MODEL = L.assets_models_dir() / L.DEFAULT_FILE
needs_model = pytest.mark.skipif(not MODEL.is_file(), reason="bundled model not present")
DY = 5.0        # the planted offset: every labelled point 5 px lower than the model put it


@pytest.fixture(scope="module")
def model_bytes():
    if not MODEL.is_file():
        pytest.skip("bundled model not present")
    return MODEL.read_bytes()


@pytest.fixture(scope="module")
def feature(model_bytes):
    graph, dec = T.feature_graph(model_bytes)
    sess = ort.InferenceSession(graph, sess_options=session_options(2), providers=["CPUExecutionProvider"])
    return sess, dec


def _crop_batch(seed=0):
    rng = np.random.default_rng(seed)
    img = (rng.random((240, 320, 3)) * 255).astype(np.uint8)
    from kinemark.core.pose.base import Region
    return L.LandmarkAdapter.prepare_crop(img, Region(160, 120, 200, 200, 0.1, ""), mirror=True)


@needs_model
def test_the_decoder_is_the_heatmap_only_part_of_the_model(feature):
    _, dec = feature
    assert {n.op_type for n in dec.nodes} <= {"Conv", "Clip", "Resize", "Add", "Transpose"}
    n_weights = sum(w.size for w in dec.weights.values())
    assert 50_000 < n_weights < 80_000, n_weights          # about 61,000 of the model's 3.2 million
    assert len(dec.inputs) == 4                              # backbone maps at 64, 32, 16 and 8 cells
    # what tuning trains: the 1x1 convolutions (weights and biases), not the depthwise filters
    pw = T.pointwise_weights(dec)
    assert pw and all(dec.weights[n].ndim == 1 or dec.weights[n].shape[2:] == (1, 1) for n in pw)
    assert all(dec.weights[n].shape[1] != 1 for n in pw if dec.weights[n].ndim == 4)


@needs_model
def test_the_decoder_in_torch_computes_what_onnx_runtime_computes(feature):
    """Reference: ONNX Runtime running the shipped graph; the torch interpretation of its
    decoder, fed the backbone maps from the same run, must give the same heatmap logits."""
    sess, dec = feature
    names = [o.name for o in sess.get_outputs()]
    res = dict(zip(names, sess.run(None, {sess.get_inputs()[0].name: _crop_batch()})))
    net = T.torch_decoder(dec)
    with torch.no_grad():
        z = net(*[torch.from_numpy(res[n]) for n in dec.inputs]).numpy()
    ref = res[dec.output]
    assert z.shape == ref.shape == (2, 64, 64, 39)
    assert np.abs(z - ref).max() < 1e-3 * max(1.0, np.abs(ref).max())
    # the fixed layers' outputs, computed once for training, give the same logits too
    front = T.static_frontier(dec, T.pointwise_weights(dec))
    with torch.no_grad():
        mid = T.torch_decoder(dec, outputs=front)(*[torch.from_numpy(res[n]) for n in dec.inputs])
        z2 = T.torch_decoder(dec, inputs=front)(*mid).numpy()
    assert np.abs(z2 - ref).max() < 1e-3 * max(1.0, np.abs(ref).max())


@needs_model
def test_onnx_runtime_runs_the_patched_weights_and_nothing_else_changes(model_bytes, feature):
    sess, dec = feature
    rng = np.random.default_rng(1)
    new = {n: (w + rng.normal(0, 0.05, w.shape) * (np.abs(w).mean() + 1e-3)).astype(np.float32)
           for n, w in dec.weights.items()}
    patched = T.patched_model(model_bytes, new)
    g2, _ = T.feature_graph(patched)
    s2 = ort.InferenceSession(g2, sess_options=session_options(2), providers=["CPUExecutionProvider"])
    x = _crop_batch(2)
    names = [o.name for o in sess.get_outputs()]
    before = dict(zip(names, sess.run(None, {sess.get_inputs()[0].name: x})))
    after = dict(zip(names, s2.run(None, {s2.get_inputs()[0].name: x})))
    with torch.no_grad():
        z = T.torch_decoder(dec, new)(*[torch.from_numpy(before[n]) for n in dec.inputs]).numpy()
    assert np.abs(after[dec.output] - z).max() < 1e-3 * max(1.0, np.abs(z).max())
    assert np.abs(after[dec.output] - before[dec.output]).max() > 1e-2      # the change took effect
    # the other outputs Kinemark reads, the regressed landmarks (with visibility and presence)
    # and the pose flag, are untouched (the segmentation mask, which Kinemark does not read,
    # shares layers with the heatmaps and may change)
    for n in names[:2]:
        assert np.array_equal(after[n], before[n]), n
    bad = dict(new)
    first = sorted(bad)[0]
    bad[first] = np.zeros(bad[first].size + 1, np.float32)
    with pytest.raises(KinemarkError, match="does not fit"):
        T.patched_model(model_bytes, bad)


def test_targets_decode_back_to_the_label():
    """A heatmap peaked at a label's target cell (crop and mirror) decodes, through the bundled
    model's own decoding (DARK, mirror average), back to the label: the coordinate conventions of
    the targets are the adapter's."""
    from kinemark.core.pose.base import Region
    from kinemark.core.skeleton import COCO17
    mapping = L.skeleton_mapping(COCO17)
    reg = Region(200.0, 150.0, 180.0, 180.0, 0.3, "")
    rng = np.random.default_rng(3)
    lab = np.column_stack([rng.uniform(140, 260, 17), rng.uniform(90, 210, 17), np.full(17, 2.0)])
    cells = T._target_cells(lab[:, :2], lab[:, 2], reg, mapping)
    gy, gx = np.mgrid[0:64, 0:64]
    hm = np.full((2, 64, 64, 39), -20.0, np.float32)
    for p in range(2):
        for c in range(39):
            if np.isfinite(cells[p, c]).all():
                d2 = (gx - cells[p, c, 0]) ** 2 + (gy - cells[p, c, 1]) ** 2
                g = np.exp(-d2 / (2 * 2.0 ** 2))
                hm[p, :, :, c] = np.log(np.clip(g, 1e-6, 1 - 1e-6) / (1 - np.clip(g, 1e-6, 1 - 1e-6)))
    data = T.TuningData([], np.zeros((1, 2, 39, 5)), [reg], cells[None], lab[None], np.array([1.0]),
                        np.array(["A"]), np.array([1]))
    used = mapping[mapping >= 0]
    chans = np.union1d(used, L.MODEL_FLIP_PERMUTATION[used])
    xy = T.points(data, np.array([0]), hm[None], mapping, chans[chans < 33].astype(int))
    assert np.abs(xy[0] - lab[:, :2]).max() < 0.5          # pixels


def test_stored_tuning_round_trip_and_a_damaged_one_is_refused(project):
    w = {"a": np.arange(6, dtype=np.float32).reshape(2, 3), "b": np.ones(4, np.float32)}
    t = T.Tuning("f" * 64, w, {"heldout_moves_raw": 1.0}, active=True)
    back = T.Tuning.from_json(t.to_json())
    assert back.active and back.base_hash == t.base_hash and back.summary == t.summary
    assert all(np.array_equal(back.weights[k], w[k]) for k in w)
    assert back.model_hash() == t.model_hash() != t.base_hash
    # other weights, other hash: proposals of two tunings are never mixed up
    assert T.Tuning("f" * 64, {**w, "b": np.zeros(4, np.float32)}).model_hash() != t.model_hash()
    project.store.set_meta(T.META_KEY, t.to_json())
    assert T.stored_tuning(project).model_hash() == t.model_hash()
    assert T.stored_tuning(project, "e" * 64) is None       # a tuning of another model file
    project.store.set_meta(T.META_KEY, "{not json")
    with pytest.raises(KinemarkError, match="damaged"):
        T.stored_tuning(project)


def test_without_pytorch_a_clear_error(project, monkeypatch):
    monkeypatch.setitem(sys.modules, "torch", None)
    with pytest.raises(KinemarkError, match="PyTorch"):
        T.tune_project(project)


# ---- on rendered clips -----------------------------------------------------------------

@pytest.fixture(scope="module")
def planted(tmp_path_factory, model_bytes):
    """The test-size scenario (two clips, two participants), every frame sampled and proposed by
    the raw model; every other frame labelled as the proposal moved DY px down (a person's
    points)."""
    from kinemark.core import ops
    from kinemark.core.demo import build_project
    from kinemark.core.synth import render_scenario
    out = tmp_path_factory.mktemp("tuning")
    render_scenario(out / "clips", seed=7, size="tiny")
    p, _ = build_project(out / "proj", out / "clips", every=1)
    try:
        ops.propose(p)
        frames = sorted(p.store.frames(), key=lambda f: (f.media_id, f.frame_index))
        for f in frames[::2]:
            k = p.store.proposal(f.id).keypoints.copy()
            v = k[:, 2] > 0
            k[v, 1] += DY
            p.store.save_annotation(f.id, k, ["human" if x else "model" for x in v], state=ACCEPTED,
                                    action="test")
    finally:
        p.close()
    return out / "proj"


def _copy(planted, tmp_path):
    dst = tmp_path / "proj"
    shutil.copytree(planted, dst)
    from kinemark.core.project import Project
    return Project.open(dst)


def _data(p, feature):
    sess, dec = feature
    _, base = T._base_model_bytes(p)
    mapping = L.skeleton_mapping(p.skeleton)
    return T.collect(p, T.labelled_pairs(p, base), sess, dec, mapping), mapping


def _channels(mapping):
    used = mapping[mapping >= 0]
    ch = np.union1d(used, L.MODEL_FLIP_PERMUTATION[used])
    return ch[ch < L.NUM_BODY].astype(int)


@needs_model
def test_tuning_learns_a_planted_offset_on_frames_it_did_not_see(planted, tmp_path, feature):
    """Synthetic check of the method: every frame of the test set labelled as the model's points
    moved 5 px down; trained on alternate frames, the decoder must move the others' points down
    by about that much (and not sideways), and bring them closer to the labels in mean OKS
    similarity (pycocotools' per-keypoint form). Neighbouring frames of the same clips are held
    out, so this measures whether the offset is learnt, not whether it carries to another view."""
    from kinemark.core.metrics import bbox_from_keypoints
    sess, dec = feature
    with _copy(planted, tmp_path) as p:
        pairs = []
        for f in sorted(p.store.frames(), key=lambda f: (f.media_id, f.frame_index)):
            prop = p.store.proposal(f.id, raw=True)
            k = prop.keypoints.copy()
            v = k[:, 2] > 0
            k[v, 1] += DY
            b = bbox_from_keypoints(k)
            pairs.append((prop, k, b[2] * b[3], "A"))
        mapping = L.skeleton_mapping(p.skeleton)
        data = T.collect(p, pairs, sess, dec, mapping)
        sig = p.skeleton.sigma_array
    n = len(data.frame_ids)
    assert n >= 40
    held = np.arange(n) % 2 == 1
    ch = _channels(mapping)
    rows = np.flatnonzero(held)
    raw = T.points(data, rows, T.heatmaps(dec, dec.weights, data, rows), mapping, ch)
    w = T.train(dec, data, np.flatnonzero(~held))
    tuned = T.points(data, rows, T.heatmaps(dec, w, data, rows), mapping, ch)
    shift = np.nanmean(tuned[..., 1] - raw[..., 1])
    assert 0.6 * DY < shift < 1.4 * DY, shift
    assert abs(np.nanmean(tuned[..., 0] - raw[..., 0])) < 0.3 * DY
    (s_raw, _), (s_tuned, _) = T.moves(data, rows, raw, sig), T.moves(data, rows, tuned, sig)
    assert s_tuned > s_raw + 0.03, (s_raw, s_tuned)
    # the raw decoder's weights left as they were: a copy is trained, not the model
    assert all(np.array_equal(dec.weights[k], v) for k, v in T.find_decoder(
        onnx.load(str(MODEL))).weights.items())


@needs_model
def test_gradient_embedding_is_the_training_losss_gradient_at_the_models_own_peak(planted, tmp_path, feature):
    """The bench's BADGE strategy (Ash et al., ICLR 2020) embeds a frame as the gradient of the
    training loss with respect to the last layer's weights, labelled with the model's own
    prediction. Checked against PyTorch's automatic differentiation of that loss (the
    train step's softmax cross-entropy against a Gaussian of TARGET_SIGMA cells, here centred
    on each heatmap's peak cell) over both passes, for the shipped and for changed weights."""
    from kinemark.core.bench_queue import gradient_embedding
    sess, dec = feature
    with _copy(planted, tmp_path) as p:
        data, mapping = _data(p, feature)
    ch = _channels(mapping)
    last = next(n for n in reversed(dec.nodes) if n.op_type == "Conv")
    rng = np.random.default_rng(3)
    other = {k: v + rng.normal(0, 0.02, v.shape).astype(np.float32) for k, v in dec.weights.items()}
    rows = np.array([0, 3, 5])
    for weights in (dec.weights, other):
        emb = gradient_embedding(dec, weights, data, rows, ch)
        assert emb.shape == (3, len(ch) * dec.weights[last.input[1]].shape[1])
        for r, i in enumerate(rows):
            net = T.torch_decoder(dec, weights)
            z = net(*[torch.from_numpy(f[[i]].reshape((-1,) + f.shape[2:]).astype(np.float32))
                      for f in data.features])                     # (2, H, W, 39)
            h, w = z.shape[1:3]
            zz = z.reshape(2, h * w, -1)[:, :, torch.from_numpy(ch)]
            peak = zz.argmax(1).detach()
            yy, xx = np.divmod(np.arange(h * w), w)
            loss = 0
            for pas in range(2):
                for c in range(len(ch)):
                    py, px = divmod(int(peak[pas, c]), w)
                    g = np.exp(-((xx - px) ** 2 + (yy - py) ** 2) / (2 * T.TARGET_SIGMA ** 2))
                    g = torch.from_numpy(g / g.sum()).float()
                    loss = loss - (g * torch.log_softmax(zz[pas, :, c], 0)).sum()
            loss.backward()
            grad = net.weight(last.input[1]).grad.numpy()[ch, :, 0, 0]
            # float32 sums over 4096 cells and two passes: about 1e-4 of the largest seen, 1e-3 allowed
            assert np.abs(grad.ravel() - emb[r]).max() < 1e-3 * max(1.0, np.abs(grad).max())


@needs_model
def test_decoded_points_and_doubt_are_what_the_adapter_stored(planted, tmp_path, feature):
    """With the raw decoder's weights, :func:`tuning.decoded` (torch, on the cached decoder
    inputs) gives back what pre-fill stored from ONNX Runtime's run of the whole model: the
    points, the flip disagreement and the heatmap entropy. The decoder inputs are cached in
    float16, so a point may move on the rare flat heatmap and the entropy differ on the rare
    channel where a second peak sits at the 10 % threshold: most values must agree closely,
    every point within 2 px, all entropies correlate."""
    sess, dec = feature
    from kinemark.core.metrics import bbox_from_keypoints
    with _copy(planted, tmp_path) as p:
        props = [p.store.proposal(f.id, raw=True) for f in p.store.frames()][:24]
        pairs = [(q, q.keypoints, float(np.prod(bbox_from_keypoints(q.keypoints)[2:])), "A") for q in props]
        mapping = L.skeleton_mapping(p.skeleton)
        data = T.collect(p, pairs, sess, dec, mapping)
    rows = np.arange(len(props))
    xy, doubt = T.decoded(data, rows, T.heatmaps(dec, dec.weights, data, rows), mapping, _channels(mapping))
    dp = np.abs(xy - np.stack([q.keypoints[:, :2] for q in props]))       # pixels
    assert np.quantile(dp, 0.98) < 0.05 and dp.max() < 2.0
    flip = np.stack([q.signals["flip_disagreement"] for q in props])
    df = np.abs(doubt["flip_disagreement"] - flip)                       # in pose sizes
    assert np.quantile(df, 0.98) < 1e-3 and df.max() < 0.05
    ent = np.stack([q.signals["heatmap_entropy"] for q in props])
    d = np.abs(doubt["heatmap_entropy"] - ent)
    assert np.isfinite(d).all() and np.quantile(d, 0.95) < 0.01
    assert np.corrcoef(ent.ravel(), doubt["heatmap_entropy"].ravel())[0, 1] > 0.999


@needs_model
def test_held_out_participants_never_reach_the_training(planted, tmp_path, feature, monkeypatch):
    _, dec = feature
    with _copy(planted, tmp_path) as p:
        data, mapping = _data(p, feature)
        sig = p.skeleton.sigma_array
    data.groups = np.array([f"P{i % 4}" for i in range(len(data.frame_ids))])
    seen = []
    real = T.train

    def spy(dec_, data_, rows, **kw):
        seen.append(set(data_.groups[rows].tolist()))
        return real(dec_, data_, rows, epochs=1, **{k: v for k, v in kw.items() if k != "epochs"})
    monkeypatch.setattr(T, "train", spy)
    s = T.cross_validate(dec, data, sig, mapping, _channels(mapping))
    folds = T.grouped_folds(data.groups)
    assert len(seen) == len(folds) == s["folds"] == 3
    for fold, groups in zip(folds, seen):
        assert groups.isdisjoint(set(data.groups[fold].tolist()))
        assert groups | set(data.groups[fold].tolist()) == {"P0", "P1", "P2", "P3"}


@needs_model
def test_the_correction_it_is_weighed_against_is_fitted_without_the_held_out_and_scored_alike(
        planted, tmp_path, feature, monkeypatch):
    """The check weighs the tuning against a correction fitted on the same labels, scored on
    the same held-out participants (nested cross-validation): each fold's correction sees none of
    that fold's participants, the planted offset is learnt on frames it did not see (OKS
    similarity rises, pycocotools' per-keypoint form), and with no correction at all the figure
    is the tuning's own scoring of the stored proposals, a point the model did not propose
    counting as a move."""
    from kinemark.core import adapt
    with _copy(planted, tmp_path) as p:
        data, mapping = _data(p, feature)
        _, base = T._base_model_bytes(p)
        s = adapt.samples_for_fit(T.labelled_pairs(p, base), p.skeleton.num_keypoints)[0]
        sig = p.skeleton.sigma_array
        stored = np.stack([p.store.proposal(int(f), raw=True).keypoints[:, :2] for f in data.frame_ids])
    data.groups = np.array([f"P{i % 4}" for i in range(len(data.frame_ids))])
    s.groups = data.groups
    folds = T.grouped_folds(data.groups)
    seen = []
    real = adapt.fit_correction

    def spy(samples, sigmas, *a, **k):
        seen.append(set(samples.groups.tolist()))
        return real(samples, sigmas, *a, **k)
    monkeypatch.setattr(adapt, "fit_correction", spy)
    rows = np.arange(len(data.frame_ids))
    sim_raw, _ = T.moves(data, rows, stored, sig)
    sim, _ = T.correction_on_folds(s, data, sig, folds)
    assert len(seen) == len(folds) == 3
    for fold, groups in zip(folds, seen):
        assert groups.isdisjoint(set(data.groups[fold].tolist()))
    assert sim > sim_raw + 0.02, (sim, sim_raw)
    # no correction kept on any fold: the stored proposals, scored as the tuning scores points
    monkeypatch.setattr(adapt, "fit_correction", lambda samples, sigmas, *a, **k: adapt.Correction(
        model_hash="", use=np.zeros(samples.R.shape[1], bool)))
    j3 = np.flatnonzero((data.labels[0, :, 2] > 0) & data.proposed[0] & np.isfinite(s.R[0]).all(axis=1))[:3]
    assert len(j3) == 3
    data.labels = data.labels.copy()
    data.labels[0, j3, :2] = stored[0, j3]          # three points labelled where the model put them
    s.R[0, j3] = 0.0
    before = T.moves(data, rows, stored, sig)
    assert T.correction_on_folds(s, data, sig, folds) == pytest.approx(before)
    data.proposed = data.proposed.copy()
    data.proposed[0, j3] = False                    # ... which the model now "did not propose"
    after = T.moves(data, rows, stored, sig)
    assert after[1] == pytest.approx(before[1] + 3 / len(rows))
    assert T.correction_on_folds(s, data, sig, folds) == pytest.approx(after)


def test_why_not_weighs_the_tuning_against_the_raw_model_and_the_correction_on_the_same_folds():
    s = {"heldout_moves_raw": 2.0, "heldout_moves_tuned": 1.0, "heldout_moves_correction": 0.9}
    assert "a correction fitted on the same labels leaves 0.90" in T.why_not(s, True)
    assert T.why_not(s, False) == ""                 # the project uses no correction: raw is the alternative
    assert T.why_not({**s, "heldout_moves_correction": 1.1}, True) == ""
    assert "against 2.00 for the raw model" in T.why_not({**s, "heldout_moves_tuned": 2.0}, True)
    assert T.why_not({k: v for k, v in s.items() if k != "heldout_moves_correction"}, True) == ""


@needs_model
def test_tune_weighs_against_a_correction_only_when_the_project_uses_one(planted, tmp_path, monkeypatch):
    """tune_project hands the check the correction's samples of exactly its labelled frames when
    the project has an active correction, and none otherwise; the refusal names the same-fold
    figure."""
    from kinemark.core import adapt
    got, widths = [], []

    def fake(dec, data, sigmas, mapping, channels, progress=None, cancel=None, *, correction=None):
        got.append((len(data.frame_ids), None if correction is None else len(correction.R)))
        widths.append(None if correction is None else correction.X.shape[1])
        out = {"frames": len(data.frame_ids), "participants": 2, "folds": 2, "heldout_similarity_raw": 0.8,
               "heldout_similarity_tuned": 0.9, "heldout_moves_raw": 1.0, "heldout_moves_tuned": 0.5}
        if correction is not None:
            out["heldout_moves_correction"] = 0.4
        return out
    monkeypatch.setattr(T, "cross_validate", fake)
    monkeypatch.setattr(T, "train", lambda dec, data, rows, **k: dict(dec.weights))
    with _copy(planted, tmp_path) as p:
        _, base = T._base_model_bytes(p)
        monkeypatch.setattr(adapt, "load_correction", lambda project, h: None)
        ch, t = T.tune_project(p)
        assert t.active and got[-1][1] is None and "with a correction fitted" not in ch.message
        monkeypatch.setattr(adapt, "load_correction", lambda project, h: adapt.Correction(
            model_hash=h, use=np.ones(p.skeleton.num_keypoints, bool)))
        ch, t = T.tune_project(p)
        n = len(T.labelled_pairs(p, base))
        assert got[-1] == (n, n)
        assert not t.active and "a correction fitted on the same labels leaves 0.40" in ch.message
        assert "1.00 -> 0.50 (0.40 with a correction fitted on the same labels)" in ch.message
        # the compared correction sees the features the project's correction was fitted with
        monkeypatch.setattr(adapt, "load_correction", lambda project, h: adapt.Correction(
            model_hash=h, use=np.ones(p.skeleton.num_keypoints, bool), with_embedding=True))
        T.tune_project(p)
        emb = T.labelled_pairs(p, base)[0][0].embedding
        assert emb is not None and widths[-1] == widths[-2] + np.asarray(emb).size


@needs_model
def test_tuning_that_does_worse_on_another_participant_is_not_used(planted, tmp_path):
    """The two participants of the test set are filmed differently (a front-view reach, an
    oblique sit-to-stand); trained on one, the decoder does worse on the other than the raw
    model, and the project keeps the raw model: nothing is re-proposed."""
    with _copy(planted, tmp_path) as p:
        before = {a.frame_id: (a.version, a.sources) for a in p.store.annotations()}
        ch, t = T.tune_project(p)
        assert not t.active and "kept the model as it was" in ch.message
        s = t.summary
        assert s["participants"] == 2 and s["heldout_moves_tuned"] >= s["heldout_moves_raw"]
        assert T.stored_tuning(p) is None
        from kinemark.core.pose import load_adapter
        assert not load_adapter(p).adapted
        assert {a.frame_id: (a.version, a.sources) for a in p.store.annotations()} == before


@needs_model
def test_a_kept_tuning_pre_fills_untouched_frames_and_never_a_persons_points(planted, tmp_path, monkeypatch):
    """The path after a held-out check that the tuning passes (the check itself is stood in for
    here; the two tests above test it): stored, loaded into the model, untouched frames pre-filled
    again as adapted from the tuned model, a person's points untouched; --untune takes it back."""
    from kinemark.core import adapt
    from kinemark.core.pose import load_adapter
    monkeypatch.setattr(T, "cross_validate", lambda *a, **k: {
        "frames": 1, "participants": 2, "folds": 2, "heldout_similarity_raw": 0.8,
        "heldout_similarity_tuned": 0.9, "heldout_moves_raw": 1.0, "heldout_moves_tuned": 0.5})
    with _copy(planted, tmp_path) as p:
        human = {a.frame_id: (a.version, a.keypoints.copy()) for a in p.store.annotations([ACCEPTED])}
        untouched = {a.frame_id: a.keypoints.copy() for a in p.store.annotations() if a.frame_id not in human}
        raw_hash = load_adapter(p, tuned=False).model_hash
        K0 = p.skeleton.num_keypoints
        ch, t = T.tune_project(p)
        assert t.active and "tuned the model's heatmap layers" in ch.message
        ad = load_adapter(p)
        assert ad.adapted and ad.model_hash == t.model_hash() != raw_hash and ad.model_id.endswith("+tuned")
        assert ad.file_hash == hashlib.sha256(MODEL.read_bytes()).hexdigest()
        shifts = []
        for fid, old in untouched.items():
            a = p.store.annotation(fid)
            assert "adapted" in a.sources and set(a.sources) <= {"adapted", "model"}
            v = (a.keypoints[:, 2] > 0) & (old[:, 2] > 0)
            shifts.append(np.mean(a.keypoints[v, 1] - old[v, 1]))
            prop = p.store.proposal(fid)
            assert prop.adapted and prop.model_hash == t.model_hash()
            assert p.store.proposal(fid, raw=True).model_hash == raw_hash
        assert np.mean(shifts) > 0.5 * DY          # trained on every label: the offset is learnt
        for fid, (version, kps) in human.items():
            a = p.store.annotation(fid)
            assert a.version == version and np.array_equal(a.keypoints, kps)
        # the correction learns from the raw model's proposals still, and leaves the tuned ones
        ch2, _ = adapt.fit_project(p)
        assert "tuned model" in ch2.message
        assert all("adapted" in p.store.annotation(fid).sources for fid in untouched)
        # a person starts on a frame the tuned model pre-filled: its tuned proposal is what
        # they started from, and stays when the tuning goes
        started = sorted(untouched)[0]
        del untouched[started]
        p.store.save_annotation(started, p.store.annotation(started).keypoints, ["human"] * K0,
                                state=DRAFTING, action="save")
        ch3, _ = T.untune(p)
        assert T.stored_tuning(p) is None and not load_adapter(p).adapted
        # the earlier tuning's proposals left the untouched frames, and only them
        assert f"dropped {len(untouched)} proposal(s) of an earlier tuning" in ch3.message
        assert not any(p.store.proposal(fid).adapted for fid in untouched)
        assert p.store.proposal(started).model_hash == t.model_hash()
        # back to the raw model's stored proposal, with the project's correction if it kept one
        corr = adapt.load_correction(p, raw_hash)
        K = p.skeleton.num_keypoints
        for fid in untouched:
            prop = p.store.proposal(fid, raw=True)
            exp = prop.keypoints if corr is None else adapt.apply_to(
                corr, prop.keypoints, prop.confidence, prop.embedding, prop.region, ["model"] * K,
                prop.signals)[0]
            assert np.allclose(np.where(exp[:, 2:3] > 0, exp, 0), p.store.annotation(fid).keypoints)


@needs_model
def test_the_queue_suggests_tuning_once_enough_labels_came_in(planted, tmp_path, monkeypatch, capsys):
    """When to suggest tuning: the count is of the labels tune_project would train on, and runs
    from the labels the stored tuning saw (kept or refused); not after a person stopped the
    tuning, nor without PyTorch, nor for another pose model, nor on a damaged stored tuning.
    (A project rule, checked against its own definition: SUGGEST_AFTER is set per test here.)"""
    from kinemark.core.cli import main
    with _copy(planted, tmp_path) as p:
        _, base = T._base_model_bytes(p)
        n = len(T.labelled_pairs(p, base))
        assert n >= T.MIN_FRAMES
        monkeypatch.setattr(T, "SUGGEST_AFTER", n - 2)
        assert f"{n} labels are ready and the model has not been tuned yet" in T.suggestion(p)

        def stored(frames, reason=None, active=False):
            s = {"frames": frames, **({"reason": reason} if reason else {})}
            p.store.set_meta(T.META_KEY, T.Tuning(base, {}, s, active=active).to_json())

        stored(3, "no better than the raw model")           # refused, but it saw 3 labels
        assert T.suggestion(p) == ""                          # n - 3 new: one short
        stored(2)
        assert f"{n - 2} labels have come in since the model was last tuned, on 2" in T.suggestion(p)
        stored(0, T.CLEARED)
        assert T.suggestion(p) == ""
        p.store.set_meta(T.META_KEY, "{not json")
        assert T.suggestion(p) == ""
        p.store.set_meta(T.META_KEY, "")
        # the labels tuning would use: a frame whose label lost its person's points drops out
        a = next(a for a in p.store.annotations([ACCEPTED]))
        p.store.save_annotation(a.frame_id, a.keypoints, ["model"] * len(a.sources), state=ACCEPTED,
                                action="test")
        monkeypatch.setattr(T, "SUGGEST_AFTER", n)
        assert T.suggestion(p) == ""
        monkeypatch.setattr(T, "SUGGEST_AFTER", n - 1)
        assert T.suggestion(p) != ""
        root = p.root
    # the command line prints it after the queue
    assert main(["rank", str(root), "--batch", "2"]) == 0
    assert "--tune)" in capsys.readouterr().out.splitlines()[-1]
    with _copy(planted, tmp_path / "again") as p:
        monkeypatch.setattr(T, "SUGGEST_AFTER", 1)
        assert T.suggestion(p) != ""
        monkeypatch.setitem(sys.modules, "torch", None)
        assert T.suggestion(p) == ""
        monkeypatch.delitem(sys.modules, "torch")
        p.store.set_meta("pose_model", "some-other-model.onnx")
        assert T.suggestion(p) == ""


def test_the_command_line_refuses_tune_with_untune(project, capsys):
    from kinemark.core.cli import main
    rc = main(["adapt", str(project.root), "--tune", "--untune"])
    assert rc != 0
    assert "contradict" in capsys.readouterr().err
