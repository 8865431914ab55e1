"""Network tuning: the pose model's heatmap decoder re-trained on a project's labels.

The second kind of per-project adaptation, beside the correction of :mod:`.adapt`. Where the
correction moves the model's points after the fact, tuning changes the part of the network
that draws the heatmaps, so later proposals come out of the model already closer to how this
team labels this population.

Method: fine-tuning of the last layers of a pre-trained network with the earlier ones frozen
(transfer learning; see Yosinski et al., "How transferable are features in deep neural
networks?", NeurIPS 2014). In the bundled BlazePose GHUM model the part that only the
heatmaps depend on is a small decoder: four depthwise-separable blocks on the backbone's
feature maps at 64, 32, 16 and 8 cells, merged by bilinear upsampling and addition, then a
1x1 convolution to the 39 heatmap logits (about 61,000 weights of the model's 3.2 million).
The landmark regression (with visibility and presence) and the pose flag do not depend on
it, so tuning changes where the body points are decoded from the heatmaps and nothing else
that Kinemark reads (the segmentation mask, unused here, shares some of its layers). Found by
structure (the nodes the heatmap output depends on and the landmark output does not), not
by name, and refused unless it consists of the operators interpreted here.

Training: the backbone's feature maps of each labelled frame (its crop and the mirror image,
as pre-fill runs them) are computed once with ONNX Runtime; the decoder is then trained on
them with PyTorch (Adam, Kingma & Ba, "Adam: A Method for Stochastic Optimization", ICLR
2015) on a softmax cross-entropy over each heatmap's cells, as the keypoint head of Mask R-CNN
is trained (He et al., ICCV 2017), here against a Gaussian of 1.5 cells at the labelled point
instead of a single cell. Fixed schedule: 10 passes over the labelled crops, learning rate
1e-3, batches of 16 (a project choice, the first setting tried in the session-9 trial; not
tuned on the benchmark's held-out participants).

Held out: as for the correction, the tuned decoder is kept only when it beats the raw model
on participants it was not trained on (folds grouped by participant) and, in a project that
uses a correction, a correction fitted on the same labels and scored on the same held-out
participants (nested cross-validation, :func:`cross_validate`); its held-out figures are stored
beside it. The tuned weights are kept in the project database and written into
the model in memory when the pose model loads; a proposal from the tuned model has its own
model hash and its points count as adapted. A person's points are never touched.

Measured (``kinemark bench queue --tuning``, 100 labelled frames, held-out participants,
joints needing a move per frame): on the seed-7 draw raw 2.77, the correction 1.37 to 1.75,
tuning 0.78 to 0.98 for every strategy but uncertainty-only (1.45); on the seed-23 draw raw
2.72, tuning 0.87 to 0.96 (uncertainty-only 1.17). Tuned on every frame of the labelling pool,
0.75 and 0.61. The combined queue in two rounds of 50 with a tuning between them (the queue
ranking on the tuned model's proposals in the second): 0.70 and 0.75; in four rounds of 25,
0.84 and 0.95. PyTorch's results differ by processor: on another machine (selection seeds 0-2)
two rounds gave 0.73 and 0.85 against random 0.87 and 0.88 and uniform 0.79 and 0.89, so strategies
are compared within one run. See DEVELOPERS.md for the full table.

PyTorch is an optional dependency (``pip install 'kinemark[tuning]'``); without it the
correction of :mod:`.adapt` is the only adaptation.
"""
from __future__ import annotations

import base64
import hashlib
import io
import json
from dataclasses import dataclass, field

import numpy as np

from .errors import KinemarkError

META_KEY = "tuning"
EPOCHS = 10
LEARNING_RATE = 1e-3
BATCH = 16
TARGET_SIGMA = 1.5          # heatmap cells
MAX_FOLDS = 3
MIN_FRAMES = 8
MIN_PARTICIPANTS = 2
# labelling in rounds: once this many labels have come in since the last tuning (or with none
# yet), the queue suggests tuning, so it ranks the frames left on the tuned model's doubts.
# A project choice from the benchmark (DEVELOPERS.md, "bench queue --tuning"): 100 labels in
# two rounds of 50 with a tuning between left fewer joints to move on held-out participants
# than the same queue's 100 tuned on once, in every run; four rounds of 25 or three of 33 did not
SUGGEST_AFTER = 50
CLEARED = "cleared by a person"       # the stored reason after untune
_OPS = {"Conv", "Clip", "Resize", "Add", "Transpose"}
_TORCH_HINT = ("network tuning needs PyTorch, which is not installed: pip install 'kinemark[tuning]' "
               "(on Linux, the CPU build: pip install torch --index-url https://download.pytorch.org/whl/cpu)")


def torch_available() -> bool:
    try:
        import torch  # noqa: F401
    except ImportError:
        return False
    return True


def _torch():
    try:
        import torch
    except ImportError:
        raise KinemarkError(_TORCH_HINT) from None
    return torch


# ---- the decoder inside the ONNX graph ---------------------------------------------------

@dataclass
class DecoderGraph:
    """The heatmap-only part of a model graph: its nodes in order, the backbone tensors it
    reads (``inputs``), the heatmap output it writes, and its trainable initializers."""
    nodes: list
    inputs: list
    output: str
    weights: dict           # initializer name -> float32 array
    constants: dict         # other initializers the nodes read (clip bounds, resize scales)


def find_decoder(proto, heatmap_output: str | None = None, landmark_output: str | None = None) -> DecoderGraph:
    """The nodes the heatmap output depends on and the landmark output does not.

    Defaults: the graph's 4th output (heatmaps) and 1st (landmarks), the bundled model's order.
    A KinemarkError when that part holds operators this module cannot train, or when one of its
    weights is also read by a node outside it (changing it would change the other outputs)."""
    from onnx import numpy_helper
    g = proto.graph
    outs = [o.name for o in g.output]
    hm = heatmap_output or outs[3]
    lm = landmark_output or outs[0]
    inits = {t.name: t for t in g.initializer}
    producer = {o: n for n in g.node for o in n.output}

    def ancestors(name):
        seen, stack = set(), [name]
        while stack:
            node = producer.get(stack.pop())
            if node is None or id(node) in seen:
                continue
            seen.add(id(node))
            stack.extend(i for i in node.input if i and i not in inits)
        return seen

    a_hm, a_lm = ancestors(hm), ancestors(lm)
    nodes = [n for n in g.node if id(n) in a_hm and id(n) not in a_lm]
    if not nodes:
        raise KinemarkError("this pose model has no heatmap-only layers to tune")
    bad = sorted({n.op_type for n in nodes} - _OPS)
    if bad:
        raise KinemarkError(f"the pose model's heatmap layers use operators network tuning cannot train "
                            f"({', '.join(bad)})")
    produced = {o for n in nodes for o in n.output}
    inputs = []
    for n in nodes:
        for i in n.input:
            if i and i not in inits and i not in produced and i not in inputs:
                inputs.append(i)
    inside = {id(n) for n in nodes}
    weights, constants = {}, {}
    for n in nodes:
        for pos, i in enumerate(n.input):
            if i not in inits:
                continue
            arr = numpy_helper.to_array(inits[i])
            if n.op_type == "Conv" and pos in (1, 2):
                weights[i] = arr.astype(np.float32)
            else:
                constants[i] = arr
    shared = [w for w in weights if any(id(m) not in inside and w in m.input for m in g.node)]
    if shared:
        raise KinemarkError("the pose model's heatmap layers share weights with its other outputs; "
                            "network tuning cannot change them alone")
    return DecoderGraph(nodes, inputs, hm, weights, constants)


def feature_graph(data: bytes) -> tuple[bytes, DecoderGraph]:
    """The bundled model, batch made dynamic, with the decoder's input tensors as extra
    outputs (so one ONNX Runtime run gives what the decoder reads), and the decoder."""
    import onnx
    from onnx import helper
    from .pose import landmark as L
    proto = onnx.load_from_string(data)
    dec = find_decoder(proto)
    edited, _ = L._edit_graph(onnx, proto, False, batch=True)
    proto = onnx.load_from_string(edited)
    for name in dec.inputs:
        proto.graph.output.append(helper.make_tensor_value_info(name, onnx.TensorProto.FLOAT, None))
    return proto.SerializeToString(), dec


def patched_model(data: bytes, weights: dict) -> bytes:
    """The model file's bytes with the decoder's weights replaced by ``weights``."""
    import onnx
    from onnx import numpy_helper
    proto = onnx.load_from_string(data)
    dec = find_decoder(proto)
    if set(weights) != set(dec.weights):
        raise KinemarkError("the stored tuning does not fit this pose model's heatmap layers; tune again")
    for t in proto.graph.initializer:
        if t.name in weights:
            new = np.asarray(weights[t.name], np.float32)
            if new.shape != dec.weights[t.name].shape:
                raise KinemarkError("the stored tuning does not fit this pose model's heatmap layers; tune again")
            t.CopyFrom(numpy_helper.from_array(new, t.name))
    return proto.SerializeToString()


def pointwise_weights(dec: DecoderGraph) -> set:
    """The weights and biases of the decoder's 1x1 convolutions (what tuning trains: the
    depthwise 3x3 filters stay as shipped; training them too did no better in the session-9
    trial, 0.42 against 0.39 joints to move on held-out participants, and took longer)."""
    out = set()
    for n in dec.nodes:
        if n.op_type == "Conv" and dec.weights[n.input[1]].shape[1:] != (1, 1, 1) \
                and dec.weights[n.input[1]].shape[2:] == (1, 1):
            out.update(i for i in n.input[1:] if i)
    return out


def static_frontier(dec: DecoderGraph, trainable: set) -> list:
    """Tensors that do not depend on ``trainable`` weights and that a node which does reads:
    computed once per frame, so training runs only the layers that change."""
    static = set(dec.inputs)
    for n in dec.nodes:
        if not any(i in trainable for i in n.input) and all(i in static or i in dec.constants or i in dec.weights
                                                            or not i for i in n.input):
            static.update(n.output)
    front = []
    for n in dec.nodes:
        if n.output[0] in static:
            continue
        for i in n.input:
            if i in static and i not in front and i not in dec.weights and i not in dec.constants:
                front.append(i)
    return front


def torch_decoder(dec: DecoderGraph, weights: dict | None = None, *, inputs: list | None = None,
                  outputs: list | None = None):
    """A PyTorch module computing the decoder's heatmap logits (N, 64, 64, 39) from its input
    tensors (in ``dec.inputs`` order, NCHW), with its weights as trainable parameters.

    ``inputs``/``outputs``: other tensors of the decoder to start from or to stop at (forward
    then returns a tuple of ``outputs``); only the nodes between them run."""
    torch = _torch()
    F = torch.nn.functional
    from onnx import helper
    inputs = list(dec.inputs if inputs is None else inputs)
    want = [dec.output] if outputs is None else list(outputs)
    producer = {o: n for n in dec.nodes for o in n.output}
    needed, stack = set(), list(want)
    while stack:
        t = stack.pop()
        if t in inputs or t not in producer or id(producer[t]) in needed:
            continue
        needed.add(id(producer[t]))
        stack.extend(producer[t].input)
    nodes = [n for n in dec.nodes if id(n) in needed]

    class Decoder(torch.nn.Module):
        def __init__(self):
            super().__init__()
            self.names = {}
            self.params = torch.nn.ParameterList()
            src = weights if weights is not None else dec.weights
            for name in dec.weights:
                self.names[name] = len(self.params)
                self.params.append(torch.nn.Parameter(torch.from_numpy(np.array(src[name], np.float32))))
            self.steps = []
            for n in nodes:
                attrs = {a.name: helper.get_attribute_value(a) for a in n.attribute}
                attrs = {k: (v.decode() if isinstance(v, bytes) else v) for k, v in attrs.items()}
                self.steps.append((n.op_type, list(n.input), n.output[0], attrs))

        def weight(self, name):
            return self.params[self.names[name]]

        def forward(self, *tensors):
            env = dict(zip(inputs, tensors))
            for op, ins, out, at in self.steps:
                if op == "Conv":
                    pads = at.get("pads", [0, 0, 0, 0])
                    if pads[0] != pads[2] or pads[1] != pads[3] or at.get("auto_pad", "NOTSET") != "NOTSET":
                        raise KinemarkError("the pose model's heatmap layers pad unevenly; cannot tune them")
                    b = self.weight(ins[2]) if len(ins) > 2 and ins[2] else None
                    env[out] = F.conv2d(env[ins[0]], self.weight(ins[1]), b, stride=tuple(at.get("strides", [1, 1])),
                                        padding=(pads[0], pads[1]), dilation=tuple(at.get("dilations", [1, 1])),
                                        groups=int(at.get("group", 1)))
                elif op == "Clip":
                    lo = float(dec.constants[ins[1]]) if len(ins) > 1 and ins[1] else None
                    hi = float(dec.constants[ins[2]]) if len(ins) > 2 and ins[2] else None
                    env[out] = torch.clamp(env[ins[0]], lo, hi)
                elif op == "Add":
                    env[out] = env[ins[0]] + env[ins[1]]
                elif op == "Resize":
                    if at.get("mode") != "linear" or at.get("coordinate_transformation_mode") != "half_pixel":
                        raise KinemarkError("the pose model's heatmap layers resize in a way network tuning "
                                            "does not implement")
                    scales = dec.constants.get(ins[2]) if len(ins) > 2 else None
                    if scales is None or len(scales) != 4:
                        raise KinemarkError("the pose model's heatmap layers resize by size, not by scale")
                    env[out] = F.interpolate(env[ins[0]], scale_factor=(float(scales[2]), float(scales[3])),
                                             mode="bilinear", align_corners=False)
                elif op == "Transpose":
                    env[out] = env[ins[0]].permute(*at["perm"])
            if outputs is None:
                return env[dec.output]
            return tuple(env[t] for t in want)

        def arrays(self) -> dict:
            return {n: self.params[i].detach().numpy().copy() for n, i in self.names.items()}

    return Decoder()


# ---- what is stored --------------------------------------------------------------------

@dataclass
class Tuning:
    base_hash: str              # sha256 of the model file the decoder was tuned from
    weights: dict               # initializer name -> float32 array
    summary: dict = field(default_factory=dict)
    active: bool = True

    @property
    def digest(self) -> str:
        h = hashlib.sha256(self.base_hash.encode())
        for name in sorted(self.weights):
            h.update(name.encode())
            h.update(np.ascontiguousarray(self.weights[name], np.float32).tobytes())
        return h.hexdigest()

    def model_hash(self) -> str:
        """The hash proposals of the tuned model are stored under (base model and weights)."""
        return self.digest

    def to_json(self) -> str:
        buf = io.BytesIO()
        np.savez_compressed(buf, **{f"w{i}": self.weights[n] for i, n in enumerate(sorted(self.weights))})
        return json.dumps({"base_hash": self.base_hash, "active": self.active, "summary": self.summary,
                           "names": sorted(self.weights),
                           "weights": base64.b64encode(buf.getvalue()).decode("ascii") if self.active else ""})

    @classmethod
    def from_json(cls, text: str) -> "Tuning":
        d = json.loads(text)
        weights = {}
        if d.get("active") and d.get("weights"):
            with np.load(io.BytesIO(base64.b64decode(d["weights"]))) as z:
                weights = {n: z[f"w{i}"] for i, n in enumerate(d["names"])}
        return cls(d["base_hash"], weights, d.get("summary", {}), bool(d.get("active")) and bool(weights))


def stored_tuning(project, base_hash: str | None = None) -> Tuning | None:
    """The project's stored tuning when it is in use (kept by its held-out check; of the model
    file with sha256 ``base_hash``, when given), else None."""
    text = project.store.get_meta(META_KEY)
    if not text:
        return None
    try:
        t = Tuning.from_json(text)
    except (ValueError, KeyError, OSError, TypeError):
        raise KinemarkError("the project's stored network tuning is damaged; tune again "
                            "(kinemark adapt DIR --tune) or clear it (kinemark adapt DIR --untune)") from None
    return t if t.active and base_hash in (None, t.base_hash) else None


# ---- training data from the project -------------------------------------------------------

@dataclass
class TuningData:
    """Per labelled frame: the decoder's inputs for the crop and its mirror, the regression
    head's landmarks (for the points DARK cannot decode), the crop region, target heatmap
    cells, and what the evaluation needs (label in frame pixels, its visibility and area)."""
    features: list              # per decoder input: (N, 2, C, H, W) float16
    landmarks: np.ndarray       # (N, 2, 39, 5)
    regions: list               # Region per frame
    targets: np.ndarray         # (N, 2, 39, 2) heatmap cells, NaN where no label
    labels: np.ndarray          # (N, K, 3) frame pixels
    area: np.ndarray            # (N,) label box area in pixels
    groups: np.ndarray          # (N,) participant codes
    frame_ids: np.ndarray
    proposed: np.ndarray | None = None   # (N, K) the model proposed the point (else it must be added)
    cache: dict = field(default_factory=dict)   # the fixed layers' outputs, see train


def _target_cells(labels_xy, vis, region, mapping):
    """Heatmap cell coordinates of the labelled points in the crop and in its mirror image."""
    from .pose import landmark as L
    from .pose.crop import apply_affine, frame_to_crop_matrix
    T = np.full((2, L.NUM_POINTS, 2), np.nan)
    cov = np.flatnonzero((mapping >= 0) & (vis > 0))
    if len(cov) == 0:
        return T
    ch = mapping[cov]
    x = apply_affine(frame_to_crop_matrix(region, L.INPUT_SIZE, L.INPUT_SIZE), labels_xy[cov]) + 0.5
    stride = L.INPUT_SIZE / L.HEATMAP_SIZE
    T[0, ch] = x / stride - 0.5
    T[1, L.MODEL_FLIP_PERMUTATION[ch]] = np.stack([(L.INPUT_SIZE - x[:, 0]) / stride - 0.5,
                                                  x[:, 1] / stride - 0.5], axis=1)
    return T


def labelled_pairs(project, base_hash: str):
    """(frame, label keypoints, label box area, participant, raw proposal) of the accepted and
    submitted labels holding a person's points whose frame the raw model proposed."""
    from .adapt import _pairs_from_project
    return [(prop, kps, area, group) for prop, kps, area, group in _pairs_from_project(project)
            if prop.model_hash == base_hash and prop.region]


def collect(project, pairs, session, dec: DecoderGraph, mapping, progress=None, cancel=None) -> TuningData:
    """Run the feature graph on every labelled frame's crop (and mirror) once."""
    from .pose.base import Region
    from .pose.landmark import LandmarkAdapter
    out_names = [o.name for o in session.get_outputs()]
    in_name = session.get_inputs()[0].name
    lm_name = out_names[0]
    feats = [[] for _ in dec.inputs]
    lms, regions, targets, labels, area, groups, fids, proposed = [], [], [], [], [], [], [], []
    for n, (prop, kps, a, group) in enumerate(pairs):
        if cancel is not None and cancel.is_set():
            break
        if progress is not None:
            progress(n, len(pairs), "reading the labelled frames")
        f = project.store.frame(prop.frame_id)
        img = project.read_frame(f.media_id, f.frame_index)
        r = prop.region
        reg = Region(r["cx"], r["cy"], r["w"], r["h"], r.get("angle", 0.0), r.get("source", ""))
        batch = LandmarkAdapter.prepare_crop(img, reg, mirror=True)
        res = dict(zip(out_names, session.run(None, {in_name: batch})))
        for k, name in enumerate(dec.inputs):
            feats[k].append(res[name].astype(np.float16))
        lms.append(res[lm_name].reshape(2, -1, 5))
        kps = np.asarray(kps, float)
        regions.append(reg)
        targets.append(_target_cells(kps[:, :2], kps[:, 2], reg, mapping))
        labels.append(kps)
        area.append(a)
        groups.append(group)
        fids.append(prop.frame_id)
        proposed.append((np.asarray(prop.keypoints)[:, 2] > 0) & (np.asarray(prop.confidence) > 0))
    return TuningData([np.stack(x) for x in feats] if fids else [], np.array(lms), regions, np.array(targets),
                      np.array(labels), np.array(area, float), np.array(groups), np.array(fids),
                      np.array(proposed) if fids else None)


# ---- training and evaluation ------------------------------------------------------------

def train(dec: DecoderGraph, data: TuningData, rows: np.ndarray, *, epochs: int = EPOCHS,
          lr: float = LEARNING_RATE, batch: int = BATCH, sigma: float = TARGET_SIGMA, seed: int = 0,
          progress=None, cancel=None, only=None) -> dict:
    """The decoder's weights after training on frames ``rows`` of ``data`` (both passes)."""
    torch = _torch()
    torch.manual_seed(seed)
    only = pointwise_weights(dec) if only is None else set(only)
    front = static_frontier(dec, only)
    feats = _frontier_features(dec, data, front)
    net = torch_decoder(dec, inputs=front)
    for name, i in net.names.items():
        net.params[i].requires_grad_(name in only)
    chans = np.flatnonzero(np.isfinite(data.targets[rows]).all(-1).any((0, 1)))
    if len(chans) == 0:
        return net.arrays()
    T = data.targets[rows][:, :, chans]                     # (n, 2, C, 2)
    ok = torch.from_numpy(np.isfinite(T).all(-1))
    Tt = torch.from_numpy(np.nan_to_num(T)).float()
    items = [(k, p) for k in range(len(rows)) for p in (0, 1)]
    opt = torch.optim.Adam([q for q in net.parameters() if q.requires_grad], lr=lr)
    rng = np.random.default_rng(seed)
    chans_t = torch.from_numpy(chans)
    for ep in range(epochs):
        order = rng.permutation(len(items))
        for s in range(0, len(order), batch):
            if cancel is not None and cancel.is_set():
                return net.arrays()
            b = [items[j] for j in order[s:s + batch]]
            kk = np.array([k for k, _ in b])
            ps = np.array([p for _, p in b])
            ins = [torch.from_numpy(f[rows[kk], ps].astype(np.float32)) for f in feats]
            z = net(*ins)                                   # (B, H, W, 39)
            hh, ww = z.shape[1], z.shape[2]
            logp = torch.log_softmax(z.reshape(len(b), hh * ww, -1)[:, :, chans_t], dim=1)
            t = Tt[kk, ps]                                  # (B, C, 2)
            G = target_maps(t[..., 0], t[..., 1], hh, ww, sigma)
            m = ok[kk, ps].float()
            loss = -((G * logp).sum(1) * m).sum() / m.sum().clamp_min(1.0)
            opt.zero_grad()
            loss.backward()
            opt.step()
        if progress is not None:
            progress(ep + 1, epochs, "training")
    return net.arrays()


def target_maps(x, y, h: int, w: int, sigma: float = TARGET_SIGMA):
    """The training targets: per (frame, channel) a Gaussian of ``sigma`` cells at heatmap cell
    (x, y), normalised to sum to 1 over the h x w cells. x, y: torch tensors (B, C); returns
    (B, h * w, C), the layout of the flattened logits the loss compares them with."""
    torch = _torch()
    gy, gx = torch.meshgrid(torch.arange(h, dtype=torch.float32), torch.arange(w, dtype=torch.float32),
                            indexing="ij")
    gx, gy = gx.reshape(1, -1, 1), gy.reshape(1, -1, 1)
    G = torch.exp(-((gx - x[:, None, :]) ** 2 + (gy - y[:, None, :]) ** 2) / (2 * sigma ** 2))
    return G / G.sum(1, keepdim=True).clamp_min(1e-12)


def _frontier_features(dec: DecoderGraph, data: "TuningData", front: list) -> list:
    """``front`` tensors of every frame in ``data`` (cached on it), from the decoder's inputs."""
    key = tuple(front)
    if key == tuple(dec.inputs):
        return data.features
    if key not in data.cache:
        torch = _torch()
        net = torch_decoder(dec, outputs=front)
        n = len(data.frame_ids)
        parts = [[] for _ in front]
        with torch.no_grad():
            for s in range(0, n, 32):
                ins = [torch.from_numpy(f[s:s + 32].reshape((-1,) + f.shape[2:]).astype(np.float32))
                       for f in data.features]
                for k, t in enumerate(net(*ins)):
                    a = t.numpy().astype(np.float16)
                    parts[k].append(a.reshape((-1, 2) + a.shape[1:]))
        data.cache[key] = [np.concatenate(p) for p in parts]
    return data.cache[key]


def heatmaps(dec: DecoderGraph, weights: dict, data: TuningData, rows: np.ndarray) -> np.ndarray:
    """(len(rows), 2, H, W, 39) heatmap logits of the decoder with ``weights``."""
    torch = _torch()
    net = torch_decoder(dec, weights)
    out = []
    with torch.no_grad():
        for s in range(0, len(rows), 32):
            r = rows[s:s + 32]
            ins = [torch.from_numpy(f[r].reshape((-1,) + f.shape[2:]).astype(np.float32)) for f in data.features]
            z = net(*ins).numpy()
            out.append(z.reshape((len(r), 2) + z.shape[1:]))
    return np.concatenate(out) if out else np.zeros((0, 2, 64, 64, 39), np.float32)


def points(data: TuningData, rows: np.ndarray, hms: np.ndarray, mapping, channels) -> np.ndarray:
    """(len(rows), K, 2) frame pixels of the skeleton's points as the bundled model's adapter
    decodes them (DARK on the crop's and the mirror's heatmaps, the two averaged)."""
    return decoded(data, rows, hms, mapping, channels, doubt=False)[0]


def decoded(data: TuningData, rows: np.ndarray, hms: np.ndarray, mapping, channels, *,
            doubt: bool = True) -> tuple[np.ndarray, dict]:
    """The points of :func:`points` and, with ``doubt``, the two doubt signals of a proposal that
    depend on the heatmaps, as the bundled model's adapter computes them: flip disagreement
    (the crop's and the mirror's point apart, over the size of the pose) and the multiple-peak
    heatmap entropy of the crop's heatmaps (Liu & Ferrari, ICCV 2017; :func:`decode.multipeak_entropy`).
    The other signals (the passes' regressed points, visibility and presence) come from the
    landmark head, which tuning does not change. Returns (points (n, K, 2), {signal: (n, K)})."""
    from .pose import landmark as L
    from .pose.decode import multipeak_entropy
    K = len(mapping)
    cov = np.flatnonzero(mapping >= 0)
    idx = mapping[cov]
    out = np.full((len(rows), K, 2), np.nan)
    flip, ent = np.full((len(rows), K), np.nan), np.full((len(rows), K), np.nan)
    for r, i in enumerate(rows):
        lms = L._dark_points(data.landmarks[i].astype(np.float64), hms[r], channels)
        reg = data.regions[i]
        m = L.crop_to_frame_matrix(reg, L.INPUT_SIZE, L.INPUT_SIZE)
        a = L.model_to_frame(lms[0][:, :2], reg, m)
        b = L.model_to_frame(L.unmirror_landmarks(lms[1])[:, :2], reg, m)
        out[r, cov] = ((a + b) / 2.0)[idx]
        if doubt:
            ext = out[r, cov].max(axis=0) - out[r, cov].min(axis=0)
            scale = float(np.sqrt(max(ext[0] * ext[1], 1.0)))
            flip[r, cov] = np.hypot(*(b - a)[idx].T) / scale
            maps = np.moveaxis(np.asarray(hms[r, 0])[..., idx], -1, 0).astype(np.float32)
            ent[r, cov] = multipeak_entropy(L._sigmoid(maps, np.float32))
    return out, ({"flip_disagreement": flip, "heatmap_entropy": ent} if doubt else {})


def moves(data: TuningData, rows: np.ndarray, xy: np.ndarray, sigmas: np.ndarray) -> tuple[float, float]:
    """(mean keypoint similarity, joints needing a move per frame) of points ``xy`` against the
    labels, with the demo's and the benchmark's definitions (:func:`adapt.evaluate`)."""
    from .adapt import Samples, evaluate, to_crop
    R = np.full(xy.shape, np.nan)
    area = np.zeros(len(rows))
    for r, i in enumerate(rows):
        reg = data.regions[i]
        rd = {"cx": reg.cx, "cy": reg.cy, "w": reg.w, "h": reg.h, "angle": reg.angle}
        R[r] = to_crop(data.labels[i, :, :2], rd) - to_crop(xy[r], rd)
        area[r] = data.area[i] / (reg.w * reg.h)
    vis = data.labels[rows, :, 2]
    R[vis <= 0] = np.nan
    if data.proposed is not None:     # a point the model did not propose must be added: a move
        R[~data.proposed[rows]] = np.nan
    ev = evaluate(None, Samples(np.zeros((len(rows), 1)), R, data.groups[rows], area, vis), sigmas)
    return ev["oks_raw"], ev["moves_raw"]


def grouped_folds(groups: np.ndarray, max_folds: int = MAX_FOLDS) -> list[np.ndarray]:
    """Held-out masks: participants dealt round-robin into at most ``max_folds`` folds."""
    uniq = sorted(set(groups.tolist()))
    k = min(len(uniq), max_folds)
    return [np.isin(groups, uniq[i::k]) for i in range(k)] if k >= 2 else []


def cross_validate(dec, data, sigmas, mapping, channels, progress=None, cancel=None, *,
                   correction=None) -> dict:
    """Raw vs tuned on held-out participants: each fold's decoder is trained without them.

    ``correction``: the correction's samples (:class:`adapt.Samples`) of the same frames in the
    same order. A correction is then fitted on each fold's other participants, as ``kinemark
    adapt`` fits one (choosing its own settings by cross-validation among them), and scored on
    the fold's held-out participants with the tuning's definition of a move
    (``heldout_moves_correction``): nested cross-validation (Varma & Simon, "Bias in error
    estimation when using cross-validation for model selection", BMC Bioinformatics 2006). The
    correction's own held-out figure is not comparable with the tuning's: it leaves out the
    points the model did not propose, which the tuning's figure counts as moves, it comes from
    other folds, and it is the best of many candidates per joint scored on the very folds that
    chose it, which can flatter it (Cawley & Talbot, "On over-fitting in model selection and
    subsequent selection bias in performance evaluation", JMLR 2010)."""
    folds = grouped_folds(data.groups)
    n = len(data.frame_ids)
    if correction is not None and len(correction.R) != n:
        raise ValueError(f"the correction's samples hold {len(correction.R)} frames, the tuning's {n}")
    raw_xy = points(data, np.arange(n), heatmaps(dec, dec.weights, data, np.arange(n)), mapping, channels)
    tuned_xy = np.full_like(raw_xy, np.nan)
    for f, held in enumerate(folds):
        if progress is not None:
            progress(f, len(folds) + 1, f"checking on held-out participants ({f + 1} of {len(folds)})")
        w = train(dec, data, np.flatnonzero(~held), cancel=cancel)
        rows = np.flatnonzero(held)
        tuned_xy[rows] = points(data, rows, heatmaps(dec, w, data, rows), mapping, channels)
    rows = np.arange(n)
    s_raw, m_raw = moves(data, rows, raw_xy, sigmas)
    s_tun, m_tun = moves(data, rows, tuned_xy, sigmas)
    out = {"frames": int(n), "participants": int(len(set(data.groups.tolist()))), "folds": len(folds),
           "heldout_similarity_raw": s_raw, "heldout_similarity_tuned": s_tun,
           "heldout_moves_raw": m_raw, "heldout_moves_tuned": m_tun}
    if correction is not None and folds:
        if progress is not None:
            progress(len(folds), len(folds) + 1, "fitting a correction on the same folds, to compare")
        out["heldout_similarity_correction"], out["heldout_moves_correction"] = \
            correction_on_folds(correction, data, sigmas, folds)
    return out


def correction_on_folds(s, data: TuningData, sigmas, folds) -> tuple[float, float]:
    """(mean keypoint similarity, joints needing a move per frame) of the raw model's proposals
    after a correction fitted without each fold, on that fold's frames; scored as :func:`moves`
    scores the tuning (a point the model did not propose counts as a move). ``s``: the
    correction's samples of ``data``'s frames, in the same order."""
    from .adapt import Samples, evaluate, fit_correction
    N, K, _ = s.R.shape
    pred = np.zeros((N, K, 2))
    for held in folds:
        corr = fit_correction(s.take(~held), sigmas)
        if corr.active:
            pred[held] = corr.predict_residual(s.X[held], K)
    R = s.R.copy()
    if data.proposed is not None:
        R[~data.proposed] = np.nan
    ev = evaluate(None, Samples(s.X, R, s.groups, s.area, s.vis), sigmas, pred=pred)
    return ev["oks_adapted"], ev["moves_adapted"]


# ---- the project operation ----------------------------------------------------------------

def _base_model_bytes(project) -> tuple[bytes, str]:
    from .pose import BUNDLED
    from .pose.landmark import LandmarkAdapter
    spec = project.store.get_meta("pose_model", BUNDLED)
    if spec not in (None, "", BUNDLED):
        raise KinemarkError("network tuning works on the bundled pose model only; this project uses "
                            f"{spec}")
    path = LandmarkAdapter._resolve_path(None)
    data = LandmarkAdapter._read_bytes(path)
    return data, hashlib.sha256(data).hexdigest()


def tune_project(project, *, user: str | None = None, progress=None, cancel=None):
    """Tune the bundled model's heatmap decoder on the project's accepted and submitted labels,
    check it on held-out participants, store it (or the decision not to use it), and pre-fill
    the frames still holding an untouched proposal again, from the model now in use.

    Returns (Changes, Tuning)."""
    import onnxruntime as ort
    from .model import Changes
    from .pose import landmark as L
    from .pose.base import session_options
    _torch()
    data, base_hash = _base_model_bytes(project)
    skel = project.skeleton
    pairs = labelled_pairs(project, base_hash)
    groups = {g for *_, g in pairs}
    if len(pairs) < MIN_FRAMES or len(groups) < MIN_PARTICIPANTS:
        raise KinemarkError(f"network tuning needs at least {MIN_FRAMES} accepted or submitted labels of frames "
                            f"the model pre-filled, from at least {MIN_PARTICIPANTS} participants (so it can be "
                            f"checked on people it was not trained on); this project has {len(pairs)} from "
                            f"{len(groups)}")
    graph, dec = feature_graph(data)
    sess = ort.InferenceSession(graph, sess_options=session_options(2), providers=["CPUExecutionProvider"])
    mapping = L.skeleton_mapping(skel)
    used = mapping[mapping >= 0]
    channels = np.union1d(used, L.MODEL_FLIP_PERMUTATION[used])
    channels = channels[channels < L.NUM_BODY].astype(int)
    td = collect(project, pairs, sess, dec, mapping, progress=progress, cancel=cancel)
    _check_cancel(cancel)
    from .adapt import load_correction, samples_for_fit
    corr = load_correction(project, base_hash)
    # the alternative to the tuning is the project's correction when it has one: then a
    # correction fitted on these labels is scored on the same held-out participants
    summary = cross_validate(dec, td, skel.sigma_array, mapping, channels, progress=progress, cancel=cancel,
                             correction=None if corr is None else
                             samples_for_fit(pairs, skel.num_keypoints, with_embedding=corr.with_embedding)[0])
    _check_cancel(cancel)
    reason = why_not(summary, corr is not None)
    if reason:
        summary["reason"] = reason
        t = Tuning(base_hash, {}, summary, active=False)
    else:
        if progress is not None:
            progress(MAX_FOLDS, MAX_FOLDS + 1, "training on every labelled frame")
        w = train(dec, td, np.arange(len(td.frame_ids)), cancel=cancel)
        _check_cancel(cancel)
        t = Tuning(base_hash, w, summary, active=True)
    who = project.user(user)
    project.store.set_meta(META_KEY, t.to_json(), user_id=who.id)
    changed, report = _repropose(project, t, base_hash, progress=progress, cancel=cancel)
    report += _drop_earlier_tunings(project, t, base_hash)
    s = summary
    figures = (f"from {s['frames']} labelled frames ({s['participants']} participants, {s['folds']} folds): "
               f"on held-out participants mean keypoint similarity {s['heldout_similarity_raw']:.3f} raw -> "
               f"{s['heldout_similarity_tuned']:.3f} tuned, joints needing a move per frame "
               f"{s['heldout_moves_raw']:.2f} -> {s['heldout_moves_tuned']:.2f}"
               + (f" ({s['heldout_moves_correction']:.2f} with a correction fitted on the same labels)"
                  if "heldout_moves_correction" in s else ""))
    if t.active:
        msg = f"tuned the model's heatmap layers {figures}; pre-filled {len(changed)} untouched frame(s) again"
    else:
        msg = f"kept the model as it was: {reason} ({figures})"
        if changed:
            msg += f"; {len(changed)} untouched frame(s) pre-filled by an earlier tuning went back"
    if report:
        msg += report
    return Changes(annotations=tuple(changed), message=msg, details={"summary": summary}), t


def suggestion(project) -> str:
    """A plain-words suggestion to tune now, or "" (PyTorch missing, another pose model, too
    few labels to tune on, fewer than SUGGEST_AFTER new since the last tuning, the last
    decision a person's to stop using it, or a damaged stored tuning, which pre-fill reports).
    Counts the labels tuning would use, those :func:`tune_project` counts."""
    import importlib.util
    if importlib.util.find_spec("torch") is None:
        return ""
    text = project.store.get_meta(META_KEY)
    t = None
    if text:
        try:
            t = Tuning.from_json(text)      # the same reading, and damage, as stored_tuning's
            if t.summary.get("reason") == CLEARED:
                return ""
        except (ValueError, KeyError, OSError, TypeError, AttributeError):
            return ""
    try:
        _, base_hash = _base_model_bytes(project)
    except (KinemarkError, OSError):
        return ""
    try:        # a tuning of another model file saw none of this model's labels
        seen = int(t.summary.get("frames", 0)) if t is not None and t.base_hash == base_hash else 0
    except (TypeError, ValueError):
        return ""
    pairs = labelled_pairs(project, base_hash)
    if len(pairs) < MIN_FRAMES or len({g for *_, g in pairs}) < MIN_PARTICIPANTS:
        return ""
    new = len(pairs) - seen
    if new < SUGGEST_AFTER:
        return ""
    since = (f"{new} labels have come in since the model was last tuned, on {seen}" if seen else
             f"{len(pairs)} labels are ready and the model has not been tuned yet")
    return (f"{since}: tuning now lets the queue rank the frames left on the tuned model's doubts "
            f"(its check on held-out participants decides whether it is used)")


def why_not(summary: dict, with_correction: bool) -> str:
    """Why a tuning with held-out figures ``summary`` (:func:`cross_validate`) is not to be used
    ("" when it is): it must leave fewer joints to move than the raw model and, when the project
    uses a correction (``with_correction``), fewer than a correction fitted on the same labels,
    both scored on the same held-out participants (``heldout_moves_correction``)."""
    tuned, raw = summary["heldout_moves_tuned"], summary["heldout_moves_raw"]
    if not tuned < raw:
        return (f"on held-out participants the tuned model left {tuned:.2f} joints per frame to move "
                f"against {raw:.2f} for the raw model")
    corr = summary.get("heldout_moves_correction")
    if with_correction and corr is not None and corr <= tuned:
        return (f"a correction fitted on the same labels leaves {corr:.2f} joints per frame to move on the "
                f"same held-out participants, no more than the tuned model's {tuned:.2f}")
    return ""


def _drop_earlier_tunings(project, t: Tuning, base_hash: str) -> str:
    """Delete the proposals of an earlier tuning on the frames still untouched that now hold a
    proposal of the model in use (the tuned one, or the raw one when no tuning is in use).
    Where a person has worked, the earlier proposal stays: it is what their labels started
    from. Returns a note for the message ("" when nothing went)."""
    from .prefill import _is_untouched
    store = project.store
    in_use = t.model_hash() if t.active else base_hash
    anns = {a.frame_id: a for a in store.annotations()}
    frames = [fid for fid in store.proposed_frame_ids(in_use) if _is_untouched(anns.get(fid))]
    n = store.drop_tuned_proposals(frames, in_use)
    return f"; dropped {n} proposal(s) of an earlier tuning from untouched frames" if n else ""


def _check_cancel(cancel):
    if cancel is not None and cancel.is_set():
        raise KinemarkError("network tuning cancelled; nothing was changed")


def _repropose(project, t: Tuning, base_hash: str, *, progress=None, cancel=None):
    """Frames still holding an untouched model proposal get the proposal of the model now in
    use: the tuned model's (a model run per frame), or, when the tuning is not used, the stored
    raw proposal with the project's correction if it has one."""
    from .adapt import Correction, load_correction, reapply
    if t.active:
        from .prefill import prefill
        ch, rep = prefill(project, frames="unlabelled", progress=progress, cancel=cancel)
        extra = rep.outcome()
        return list(ch.annotations), extra
    corr = load_correction(project, base_hash) or Correction(base_hash, np.zeros(project.skeleton.num_keypoints, bool))
    changed, _, skipped = reapply(project, corr)
    return changed, (f"; {skipped} frame(s) saved by someone meanwhile were left as they saved them"
                     if skipped else "")


def untune(project, *, user: str | None = None):
    """Stop using the project's tuning: untouched frames it pre-filled go back to the raw model's
    proposal (with the project's correction, if any)."""
    from .model import Changes
    text = project.store.get_meta(META_KEY)
    if not text:
        return Changes(message="this project has no network tuning; nothing was changed"), None
    _, base_hash = _base_model_bytes(project)
    t = Tuning(base_hash, {}, {"reason": CLEARED}, active=False)
    who = project.user(user)
    project.store.set_meta(META_KEY, t.to_json(), user_id=who.id)
    changed, extra = _repropose(project, t, base_hash)
    extra += _drop_earlier_tunings(project, t, base_hash)
    return Changes(annotations=tuple(changed),
                   message=f"stopped using the network tuning; {len(changed)} untouched frame(s) went back to "
                           f"the raw model's proposal{extra}"), t
