"""The bundled landmark model: BlazePose GHUM "full", run with ONNX Runtime on the CPU.

Model: Bazarevsky, Grishchenko, Raveendran, Zhu, Zhang, Grundmann, "BlazePose:
On-device Real-time Body Pose tracking", CVPR Workshop on Computer Vision for
AR/VR, 2020. The 33-landmark GHUM topology and the tracking pipeline (crop
from the previous pose, rotated so the body is upright) are described there
and on the MediaPipe Pose documentation. The weights come from the mediapipe
0.10.14 wheel (Apache License 2.0), converted to ONNX by
``assets/models/convert_blazepose.sh``; ``assets/models/MODEL_CARD.md`` has the
provenance, the contract and the limits.

Model contract (checked at load time, by shape, not by tensor name):

* one input, float32 (1 or N, 256, 256, 3): an RGB crop with values in [0, 1];
* landmarks (., 195): 39 points x (x, y, z, visibility logit, presence logit),
  x and y in input pixels where 0 and 256 are the crop's outer edges (so
  model x is OpenCV pixel coordinate ``u = x - 0.5``); points 0-32 are the
  published body topology, 33 (hip centre) and 34 (a point whose distance
  from 33 sets the scale and whose direction sets the rotation) are the
  auxiliary alignment points of the tracking pipeline, 35-38 are not used;
* pose flag (., 1): probability that a person is in the crop (the graph
  already applies the sigmoid);
* heatmaps (., 64, 64, 39): one logit map per point (sigmoid gives [0, 1]).

Pipeline of :meth:`LandmarkAdapter.predict`, in order of preference for the
crop: the region the annotator drew; a region built from the pose on a
neighbouring frame (box of its keypoints plus a margin, rotated so hip
centre -> shoulder centre is up); otherwise a first pass on the letterboxed
whole frame, then crops built from the previous pass's alignment points
(two more by default). The final crop runs together with its mirror image.
Keypoints go back to frame pixels through the exact inverse of the crop's
affine map.

Per-joint signals (``PoseResult.signals``, NaN where not computed or not covered):
``flip_disagreement`` (normal vs un-mirrored prediction, / scale),
``heatmap_entropy`` (multiple-peak entropy of the sigmoid heatmap,
:func:`..decode.multipeak_entropy`), ``presence`` and ``visibility`` (sigmoid
of the model's two per-point logits), ``pass_disagreement`` (the pass before
the final one vs the final one, on the regressed points before any heatmap
decoding, / scale; NaN with a single pass), and ``regressed_x`` / ``regressed_y``
(not an uncertainty: the regression head's points in frame pixels, before
heatmap decoding, for the per-project correction). Scale is the
square root of the area of the box around the predicted covered keypoints.
``confidence`` = visibility x presence; ``score`` = pose flag x mean
confidence over covered keypoints.
"""
from __future__ import annotations

import hashlib
import json
import math
import os
from pathlib import Path

import cv2
import numpy as np

from ..errors import KinemarkError
from ..skeleton import Skeleton, derive_flip_pairs
from .base import PoseAdapter, PoseResult, Region, session_options
from .crop import apply_affine, crop_to_frame_matrix, extract_crop, whole_frame_region
from .decode import dark_decode, multipeak_entropy

# --- the model's topology -------------------------------------------------------------

# Source: the 33-landmark BlazePose GHUM body topology published in Bazarevsky et
# al. 2020 (CVPR Workshop on CV for AR/VR) and listed, with these names, on the
# MediaPipe Pose documentation (landmark model output order).
BLAZEPOSE_LANDMARKS = (
    "nose",
    "left_eye_inner", "left_eye", "left_eye_outer",
    "right_eye_inner", "right_eye", "right_eye_outer",
    "left_ear", "right_ear",
    "mouth_left", "mouth_right",
    "left_shoulder", "right_shoulder",
    "left_elbow", "right_elbow",
    "left_wrist", "right_wrist",
    "left_pinky", "right_pinky",
    "left_index", "right_index",
    "left_thumb", "right_thumb",
    "left_hip", "right_hip",
    "left_knee", "right_knee",
    "left_ankle", "right_ankle",
    "left_heel", "right_heel",
    "left_foot_index", "right_foot_index",
)
NUM_BODY = len(BLAZEPOSE_LANDMARKS)  # 33
NUM_POINTS = 39                       # body + auxiliary points in the output tensor
AUX_HIP_CENTRE = 33                   # alignment point: centre of the hips
AUX_SCALE_POINT = 34                  # alignment point: sets the crop's scale and rotation
INPUT_SIZE = 256
HEATMAP_SIZE = 64

# Other names a custom skeleton may use for a point the model predicts. These are
# approximations, not the same anatomical definition: BlazePose's "foot index" is
# the tip of the foot (around the second toe), close to but not exactly the big
# toe; "mouth_left/right" are the mouth corners.
ALIASES = {
    "left_big_toe": "left_foot_index",
    "right_big_toe": "right_foot_index",
    "left_toe": "left_foot_index",
    "right_toe": "right_foot_index",
    "left_mouth": "mouth_left",
    "right_mouth": "mouth_right",
    "left_index_finger": "left_index",
    "right_index_finger": "right_index",
    "left_pinky_finger": "left_pinky",
    "right_pinky_finger": "right_pinky",
}
APPROXIMATE_ALIASES = frozenset(ALIASES)


def _model_flip_permutation() -> np.ndarray:
    """(39,) index array swapping the model's left and right points (aux points fixed)."""
    perm = np.arange(NUM_POINTS)
    for a, b in derive_flip_pairs(list(BLAZEPOSE_LANDMARKS)):
        perm[a], perm[b] = b, a
    # mouth_left / mouth_right do not follow the left_/right_ prefix rule
    ml, mr = BLAZEPOSE_LANDMARKS.index("mouth_left"), BLAZEPOSE_LANDMARKS.index("mouth_right")
    perm[ml], perm[mr] = mr, ml
    return perm


MODEL_FLIP_PERMUTATION = _model_flip_permutation()


def landmark_index_for(name: str) -> int | None:
    """The model point a skeleton keypoint name maps to (by name or alias), or None."""
    name = ALIASES.get(name, name)
    try:
        return BLAZEPOSE_LANDMARKS.index(name)
    except ValueError:
        return None


def skeleton_mapping(skeleton: Skeleton) -> np.ndarray:
    """(K,) int: the model point index for each skeleton keypoint, -1 where not covered."""
    return np.array([(-1 if (i := landmark_index_for(n)) is None else i)
                     for n in skeleton.keypoints], dtype=np.int64)


# --- crop geometry --------------------------------------------------------------------

def upright_angle(bottom_xy, top_xy) -> float:
    """Region angle (radians, :class:`Region` convention) that makes bottom->top point up.

    With this angle the crop's "up" (its -y axis) is along ``top - bottom`` in
    the frame; ``top`` straight above ``bottom`` gives 0.
    """
    dx, dy = float(top_xy[0] - bottom_xy[0]), float(top_xy[1] - bottom_xy[1])
    if dx == 0.0 and dy == 0.0:
        return 0.0
    return math.atan2(dx, -dy)


def region_from_keypoints(xy: np.ndarray, valid: np.ndarray, *, margin: float = 0.25,
                          upright_axis=None, aspect: float = 1.0,
                          source: str = "keypoints", min_size: float = 1.0) -> Region | None:
    """A crop region around a set of keypoints (frame pixels).

    ``xy`` (N, 2), ``valid`` (N,) bool. ``upright_axis`` is
    ``((hip_a, hip_b), (shoulder_a, shoulder_b))``: indices into ``xy``; when all
    four are valid the region is rotated so that hip centre -> shoulder centre
    points up (the rotation step of the BlazePose tracking pipeline, Bazarevsky
    et al. 2020); otherwise it is upright (angle 0). The box is the extent of
    the valid points along the region's own axes, grown by ``margin`` times
    its size on every side, then widened to ``aspect`` (w/h). Returns None
    when fewer than two valid points are given or the box is smaller than
    ``min_size`` pixels on both sides.
    """
    xy = np.asarray(xy, dtype=float)
    valid = np.asarray(valid, dtype=bool) & np.isfinite(xy).all(axis=1)
    if valid.sum() < 2:
        return None
    angle = 0.0
    if upright_axis is not None:
        (ha, hb), (sa, sb) = upright_axis
        idx = [ha, hb, sa, sb]
        if all(0 <= i < len(xy) for i in idx) and valid[idx].all():
            hip = (xy[ha] + xy[hb]) / 2.0
            sho = (xy[sa] + xy[sb]) / 2.0
            angle = upright_angle(hip, sho)
    c, s = math.cos(angle), math.sin(angle)
    ex, ey = np.array([c, s]), np.array([-s, c])
    pts = xy[valid]
    u, v = pts @ ex, pts @ ey
    w, h = float(u.max() - u.min()), float(v.max() - v.min())
    if max(w, h) < min_size:
        return None
    cu, cv = (u.max() + u.min()) / 2.0, (v.max() + v.min()) / 2.0
    centre = cu * ex + cv * ey
    side_w = max(w, 1e-6) * (1.0 + 2.0 * margin)
    side_h = max(h, 1e-6) * (1.0 + 2.0 * margin)
    return Region(float(centre[0]), float(centre[1]), side_w, side_h, angle,
                  source).with_aspect(aspect)


def region_from_alignment(centre_xy, scale_xy, *, scale: float = 1.25,
                          source: str = "first_pass") -> Region | None:
    """The square crop the two auxiliary alignment points define.

    As in the BlazePose tracking pipeline (Bazarevsky et al. 2020): centred on
    the hip-centre point, rotated so the vector to the scale point points up,
    side twice that vector's length, times ``scale`` (1.25 in the published
    pipeline, from memory). None if the points coincide or are not finite.
    """
    c = np.asarray(centre_xy, dtype=float)
    t = np.asarray(scale_xy, dtype=float)
    if not (np.isfinite(c).all() and np.isfinite(t).all()):
        return None
    d = float(np.hypot(*(t - c)))
    if d < 0.5:
        return None
    side = 2.0 * d * scale
    return Region(float(c[0]), float(c[1]), side, side, upright_angle(c, t), source)


def model_to_frame(points_uv: np.ndarray, region: Region, matrix: np.ndarray | None = None) -> np.ndarray:
    """(N, 2) model-output x, y (input pixels, edges at 0 and 256) -> frame pixels.

    ``matrix``: :func:`crop.crop_to_frame_matrix` of ``region`` at the model's input
    size, when the caller maps several point sets through one region."""
    m = crop_to_frame_matrix(region, INPUT_SIZE, INPUT_SIZE) if matrix is None else matrix
    return apply_affine(m, np.asarray(points_uv, dtype=float) - 0.5)


def unmirror_landmarks(raw: np.ndarray, width: int = INPUT_SIZE) -> np.ndarray:
    """Landmarks predicted on a horizontally mirrored crop, expressed for the original crop.

    ``raw`` (39, >=2) model output on ``crop[:, ::-1]``. The x coordinate is
    reflected (``x -> width - x``: edges at 0 and ``width``) and left/right
    points are swapped, because on the mirror image the model's "left wrist"
    is the person's right wrist. Returns a new array.
    """
    out = np.array(raw, dtype=float, copy=True)
    out[:, 0] = width - out[:, 0]
    return out[MODEL_FLIP_PERMUTATION[: len(out)]]


def _sigmoid(z, dtype=np.float64):
    z = np.asarray(z, dtype=dtype)
    return 1.0 / (1.0 + np.exp(-np.clip(z, -60.0, 60.0)))


def _sigmoid_inplace(z: np.ndarray) -> np.ndarray:
    """:func:`_sigmoid` of a float array, written over it (no temporary arrays)."""
    np.negative(z, out=z)
    np.clip(z, -60.0, 60.0, out=z)
    np.exp(z, out=z)
    z += 1.0
    return np.reciprocal(z, out=z)


def _channel_major(heatmaps: np.ndarray, channels: np.ndarray) -> np.ndarray:
    """(B, C, 64, 64) contiguous copy of ``channels`` of (B, 64, 64, 39) heatmaps."""
    return np.ascontiguousarray(np.take(heatmaps, channels, axis=3).transpose(0, 3, 1, 2))


# --- loading --------------------------------------------------------------------------

MODEL_JSON = "model.json"
DEFAULT_FILE = "pose_landmark_full.onnx"


def assets_models_dir() -> Path:
    """Folder of the bundled model: ``$KINEMARK_ASSETS/models`` if set, else the repository's."""
    env = os.environ.get("KINEMARK_ASSETS")
    if env:
        return Path(env) / "models"
    return Path(__file__).resolve().parents[2] / "assets" / "models"


def _read_model_json(folder: Path) -> dict | None:
    p = folder / MODEL_JSON
    if not p.exists():
        return None
    try:
        data = json.loads(p.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as e:
        raise KinemarkError(f"cannot read the model description: {e}", where=str(p)) from None
    if not isinstance(data, dict):
        raise KinemarkError("the model description must be a JSON object", where=str(p))
    return data


def _shape(arg) -> list:
    return [d if isinstance(d, int) else None for d in (arg.shape or [])]


def _shape_text(s) -> str:
    return "[" + ", ".join("N" if d is None else str(d) for d in s) + "]"


def _fits(actual: list, expected: tuple) -> bool:
    """Shape match where None (dynamic) in ``actual`` matches anything at the batch position."""
    if len(actual) != len(expected):
        return False
    for i, (a, e) in enumerate(zip(actual, expected)):
        if a is None and i == 0:
            continue
        if a != e:
            return False
    return True


class LandmarkAdapter(PoseAdapter):
    """BlazePose GHUM full landmark model (ONNX, CPU) as a :class:`PoseAdapter`.

    ``model_path``: the .onnx file; default the bundled one
    (:func:`assets_models_dir`, file named in its ``model.json``). When a
    ``model.json`` beside the file names it, its sha256 is checked.
    ``threads``: ONNX Runtime intra-op threads (default 2).
    ``visible_threshold``: confidence at or above which an in-frame point gets v=2.
    ``absent_threshold``: presence probability below which a point gets v=0.
    ``flip``: also run the mirrored crop (gives ``flip_disagreement``).
    ``flip_average``: report the mean of the normal and the un-mirrored
    prediction (flip testing, common practice in heatmap pose estimation, e.g.
    the test protocol of Xiao, Wu, Wei, ECCV 2018, "Simple Baselines for Human
    Pose Estimation and Tracking", which averages the two heatmaps; quoted
    from memory). On the demo renders it raised keypoint AP by about 0.04.
    ``refine``: take the body points' coordinates from the heatmaps, by
    ``heatmap_decode``: ``"dark"`` (default; :func:`_dark_points`, DARK of
    Zhang et al., CVPR 2020, on each channel, the regressed point kept where a
    channel has no peak) or ``"window"`` (the published pipeline's 7 x 7
    weighted mean around the regressed point, :func:`_refine`). On the
    Quillon Bay demo renders (783 frames, 6 invented participants) DARK with
    flip averaging gave keypoint AP 0.530 and 2.79 joints needing a move per
    frame, against 0.489 and 3.09 for the window (a project choice measured on
    invented data, not on patients).
    ``embedding``: add the appearance vector (needs the ``onnx`` package).
    ``passes``: crops run when neither a region nor a previous pose is given:
    the letterboxed whole frame, then ``passes - 1`` crops each built from the
    previous pass's alignment points.
    ``crop_margin``: margin of the crop built from a neighbouring frame's pose
    (fraction of the keypoint box on every side).
    ``alignment_scale``: factor on the alignment-point crop. The published
    pipeline uses 1.25 (from memory); on the Quillon Bay demo renders (seated
    and standing figures in 640x480 frames, 288 frames from 24 clips) 1.0 with
    three passes gave keypoint AP 0.51-0.54 against 0.24-0.28 for 1.25 with two
    passes, so 1.0 and three passes are the defaults (a project choice measured
    on invented data, not on patients).
    """

    model_id = "blazepose-ghum-full"

    def __init__(self, skeleton: Skeleton, model_path: str | Path | None = None, *,
                 threads: int = 2, visible_threshold: float = 0.5,
                 absent_threshold: float = 0.2, flip: bool = True, refine: bool = True,
                 embedding: bool = True, flip_average: bool = True, passes: int = 3,
                 crop_margin: float = 0.2, alignment_scale: float = 1.0, heatmap_decode: str = "dark",
                 tuning=None):
        super().__init__(skeleton)
        if heatmap_decode not in ("dark", "window"):
            raise ValueError(f"heatmap_decode must be 'dark' or 'window', not {heatmap_decode!r}")
        self.heatmap_decode = heatmap_decode
        self.visible_threshold = float(visible_threshold)
        self.absent_threshold = float(absent_threshold)
        self.flip = bool(flip)
        self.refine = bool(refine)
        self.flip_average = bool(flip_average)
        if int(passes) < 1:
            raise ValueError("passes must be at least 1")
        self.passes = int(passes)
        self.crop_margin = float(crop_margin)
        self.alignment_scale = float(alignment_scale)
        self._threads = max(1, int(threads))

        self._map = skeleton_mapping(skeleton)
        self._covered = self._map >= 0
        if not self._covered.any():
            raise KinemarkError(
                f"the BlazePose landmark model covers none of skeleton {skeleton.name!r}'s "
                f"keypoints ({', '.join(skeleton.keypoints)}). It predicts: "
                f"{', '.join(BLAZEPOSE_LANDMARKS)}; also accepted: "
                f"{', '.join(f'{a} (= {b})' for a, b in ALIASES.items())}. "
                "Rename the skeleton's keypoints to these names or choose another model.")
        self._axis = self._skeleton_axis(skeleton)
        # heatmap channels worth decoding: the body points the skeleton uses, and their
        # left/right partners (the mirrored crop's channel for each)
        used = self._map[self._covered]
        both = np.union1d(used, MODEL_FLIP_PERMUTATION[used])
        self._heat_channels = both[both < NUM_BODY].astype(int)
        # where the skeleton's channels sit among them (for the entropy); every used body point
        # is among them by construction, so only a skeleton using an auxiliary point has none
        self._entropy_rows = np.searchsorted(self._heat_channels, used) if np.all(used < NUM_BODY) else None

        self.model_path = self._resolve_path(model_path)
        data = self._read_bytes(self.model_path)
        self._hash = hashlib.sha256(data).hexdigest()
        self._check_description(self.model_path, self._hash)
        # a project's tuned heatmap decoder (core.tuning), written into the graph in memory; a
        # tuning of another model file (the bundled model was updated) is not applied
        self.file_hash = self._hash
        if tuning is not None and tuning.active and tuning.base_hash == self._hash:
            from ..tuning import patched_model
            data = patched_model(data, tuning.weights)
            self._hash = tuning.model_hash()
            self.model_id = f"{type(self).model_id}+tuned"
            self.adapted = True
        self._session, self._embedding_name, self._batched = self._make_session(data, embedding)
        self._io = self._check_contract(self._session, self.model_path)

    # -- PoseAdapter ------------------------------------------------------------------

    @property
    def model_hash(self) -> str:
        return self._hash

    def covered(self) -> np.ndarray:
        return self._covered.copy()

    def not_covered(self) -> list[str]:
        """Names of the skeleton's keypoints this model does not predict."""
        return [n for n, c in zip(self.skeleton.keypoints, self._covered) if not c]

    def approximate(self) -> list[str]:
        """Names of the skeleton's keypoints that are covered only through an approximate alias."""
        return [n for n, c in zip(self.skeleton.keypoints, self._covered)
                if c and n in APPROXIMATE_ALIASES]

    @property
    def embedding_tensor(self) -> str | None:
        """Name of the graph tensor pooled into the embedding (None: no embedding)."""
        return self._embedding_name

    # -- loading ------------------------------------------------------------------------

    @staticmethod
    def _skeleton_axis(skeleton: Skeleton):
        names = skeleton.keypoints
        need = ("left_hip", "right_hip", "left_shoulder", "right_shoulder")
        if all(n in names for n in need):
            i = [names.index(n) for n in need]
            return ((i[0], i[1]), (i[2], i[3]))
        return None

    @staticmethod
    def _resolve_path(model_path) -> Path:
        if model_path is not None:
            p = Path(model_path)
        else:
            folder = assets_models_dir()
            desc = _read_model_json(folder)
            name = (desc or {}).get("file") or DEFAULT_FILE
            p = folder / str(name)
        if not p.is_file():
            hint = ("" if model_path is not None else
                    " The bundled model belongs in assets/models of the Kinemark folder "
                    "(set KINEMARK_ASSETS to the folder that holds models/ if it lives elsewhere).")
            raise KinemarkError(f"pose model file not found: {p}.{hint}")
        return p

    @staticmethod
    def _read_bytes(path: Path) -> bytes:
        try:
            data = path.read_bytes()
        except OSError as e:
            raise KinemarkError(f"cannot read the pose model: {e.strerror or e}", where=str(path)) from None
        if not data:
            raise KinemarkError("the pose model file is empty; restore it from the Kinemark "
                                "distribution", where=str(path))
        return data

    @staticmethod
    def _check_description(path: Path, digest: str) -> None:
        desc = _read_model_json(path.parent)
        if not desc or desc.get("file") != path.name or not desc.get("sha256"):
            return
        if str(desc["sha256"]).lower() != digest:
            raise KinemarkError(
                f"the pose model's sha256 is {digest[:12]}..., but {MODEL_JSON} beside it expects "
                f"{str(desc['sha256'])[:12]}...: the file is damaged, truncated or was replaced. "
                "Restore it from the Kinemark distribution (or rerun "
                "assets/models/convert_blazepose.sh --install).", where=str(path))

    def _make_session(self, data: bytes, want_embedding: bool):
        import onnxruntime as ort

        so = session_options(self._threads)

        def session(blob):
            return ort.InferenceSession(blob, sess_options=so, providers=["CPUExecutionProvider"])

        edited, emb_name = None, None
        try:
            import onnx  # optional at run time (test extra); without it: batch 1, no embedding
        except ImportError:
            onnx = None
        if onnx is not None:
            try:
                proto = onnx.load_from_string(data)
            except Exception as e:  # protobuf raises its own DecodeError types
                raise KinemarkError(f"the pose model is damaged or not an ONNX file ({_one_line(e)}). "
                                    "Restore it from the Kinemark distribution.",
                                    where=str(self.model_path)) from None
            try:
                edited, emb_name = _edit_graph(onnx, proto, want_embedding)
            except Exception:  # an unexpected graph: keep the file as it is
                edited, emb_name = None, None
        if edited is not None:
            try:
                sess = session(edited)
                if _batch_works(sess):
                    return sess, emb_name, True
                # batch editing broke something: keep the embedding, batch of 1
                proto = onnx.load_from_string(data)
                edited, emb_name = _edit_graph(onnx, proto, want_embedding, batch=False)
                return session(edited), emb_name, False
            except Exception:
                pass
        try:
            return session(data), None, False
        except Exception as e:
            raise KinemarkError(f"ONNX Runtime cannot load the pose model: it is damaged or not an "
                                f"ONNX file ({_one_line(e)}). Restore it from the Kinemark "
                                "distribution.", where=str(self.model_path)) from None

    @staticmethod
    def _check_contract(sess, path: Path) -> dict:
        ins, outs = sess.get_inputs(), sess.get_outputs()
        found = ("inputs " + ", ".join(f"{a.name} {_shape_text(_shape(a))} {a.type}" for a in ins)
                 + "; outputs " + ", ".join(f"{a.name} {_shape_text(_shape(a))}" for a in outs))
        expected = ("one float input [1, 256, 256, 3] and outputs shaped [1, 195] (landmarks), "
                    "[1, 1] (pose flag) and [1, 64, 64, 39] (heatmaps)")

        def bad():
            return KinemarkError(
                f"this ONNX file is not the BlazePose GHUM landmark model Kinemark expects: "
                f"expected {expected}, found {found}. Use the bundled model or a conversion "
                "made by assets/models/convert_blazepose.sh.", where=str(path))

        if len(ins) != 1 or ins[0].type != "tensor(float)" or \
                not _fits(_shape(ins[0]), (1, INPUT_SIZE, INPUT_SIZE, 3)):
            raise bad()
        io = {"input": ins[0].name}
        for o in outs:
            s = _shape(o)
            if "landmarks" not in io and _fits(s, (1, NUM_POINTS * 5)):
                io["landmarks"] = o.name
            elif "flag" not in io and _fits(s, (1, 1)):
                io["flag"] = o.name
            elif "heatmaps" not in io and _fits(s, (1, HEATMAP_SIZE, HEATMAP_SIZE, NUM_POINTS)):
                io["heatmaps"] = o.name
        if not {"landmarks", "flag", "heatmaps"} <= set(io):
            raise bad()
        return io

    # -- inference ----------------------------------------------------------------------

    def predict_raw(self, crops_rgb_float: np.ndarray) -> dict:
        """Inference only, on prepared crops (N, 256, 256, 3) RGB float32 in [0, 1].

        Returns a dict of arrays: ``landmarks`` (N, 39, 5) raw model output (x, y
        in input pixels, logits), ``pose_flag`` (N,) probability, ``heatmaps``
        (N, 64, 64, 39) logits and, when available, ``features`` (N, C, h, w),
        the tensor the embedding pools.
        """
        x = np.ascontiguousarray(crops_rgb_float, dtype=np.float32)
        if x.ndim != 4 or x.shape[1:] != (INPUT_SIZE, INPUT_SIZE, 3):
            raise ValueError(f"crops must be (N, {INPUT_SIZE}, {INPUT_SIZE}, 3), got {x.shape}")
        names = [self._io["landmarks"], self._io["flag"], self._io["heatmaps"]]
        if self._embedding_name:
            names.append(self._embedding_name)
        step = 2 if self._batched else 1
        parts = [self._session.run(names, {self._io["input"]: x[i:i + step]})
                 for i in range(0, len(x), step)]
        if not parts:
            out = {"landmarks": np.zeros((0, NUM_POINTS, 5), np.float32),
                   "pose_flag": np.zeros(0, np.float32),
                   "heatmaps": np.zeros((0, HEATMAP_SIZE, HEATMAP_SIZE, NUM_POINTS), np.float32)}
            return out
        cat = parts[0] if len(parts) == 1 else \
            [np.concatenate([p[j] for p in parts], axis=0) for j in range(len(names))]
        out = {"landmarks": cat[0].reshape(len(x), NUM_POINTS, 5),
               "pose_flag": cat[1].reshape(len(x)),
               "heatmaps": cat[2]}
        if self._embedding_name:
            out["features"] = cat[3]
        return out

    @staticmethod
    def prepare_crop(frame_bgr: np.ndarray, region: Region, *, mirror: bool = False) -> np.ndarray:
        """The model's input for ``region``: (256, 256, 3) RGB float32 in [0, 1]; with
        ``mirror``, (2, 256, 256, 3): the crop and its left-right mirror image."""
        crop = extract_crop(frame_bgr, region, INPUT_SIZE, INPUT_SIZE)
        # cvtColor rather than a reversed-channel view: astype over a negative stride is
        # several times slower, and the values are the same
        rgb = cv2.cvtColor(crop, cv2.COLOR_BGR2RGB)
        out = np.empty(((2,) if mirror else ()) + rgb.shape, np.float32)
        # mirrored and scaled straight into one contiguous batch: the 8-bit image is
        # flipped, not the float one, and the scaling is one pass (float32 x * (1/255),
        # as before)
        scale = np.float32(1.0 / 255.0)
        if mirror:
            np.multiply(rgb, scale, out=out[0])
            np.multiply(cv2.flip(rgb, 1), scale, out=out[1])
        else:
            np.multiply(rgb, scale, out=out)
        return out

    def _run_region(self, frame: np.ndarray, region: Region, flip: bool, decode: bool = True) -> dict:
        """One model run on ``region`` (and its mirror with ``flip``). ``decode``: take the body
        points from the heatmaps (``refine``); a pass that only places the next crop skips it,
        since the crop comes from the auxiliary alignment points, which are never decoded."""
        # with flip, the crop and its mirror image (left-right) as one batch
        batch = self.prepare_crop(frame, region, mirror=flip)
        raw = self.predict_raw(batch if flip else batch[None])
        lms = raw["landmarks"].astype(np.float64)
        regressed = lms[0]
        # the decoded channels, channel-major, gathered once for DARK and the entropy
        maps = _channel_major(raw["heatmaps"], self._heat_channels) if decode else None
        if decode and self.refine and self.heatmap_decode == "dark":
            lms = _dark_points(lms, raw["heatmaps"], self._heat_channels, maps=maps)
        elif decode and self.refine:     # the crop and its mirror in one go
            lms = _refine(lms, raw["heatmaps"])
        hm = raw["heatmaps"][0]
        res = {"region": region, "lm": lms[0], "lm_regressed": regressed, "heatmaps": hm,
               "flag": float(raw["pose_flag"][0])}
        if maps is not None:
            res["maps"] = maps[0]
        if flip:
            res["lm_flip"] = unmirror_landmarks(lms[1])
            res["lm_flip_regressed"] = unmirror_landmarks(raw["landmarks"][1].astype(np.float64))
        if "features" in raw:
            res["features"] = raw["features"][0]
        return res

    def predict(self, frame_bgr: np.ndarray, region: Region | None = None, *,
                previous: np.ndarray | None = None) -> PoseResult:
        frame = _as_bgr(frame_bgr)
        h, w = frame.shape[:2]
        earlier = None
        if region is not None:
            if not (np.isfinite([region.cx, region.cy, region.w, region.h, region.angle]).all()
                    and region.w >= 2 and region.h >= 2):
                raise KinemarkError(f"the region ({region.w:g} x {region.h:g} px) is too small "
                                    "or not a valid box; draw a box around the whole person")
            reg = region.with_aspect(1.0)
        else:
            reg = self._region_from_previous(previous)
            if reg is None:
                reg = whole_frame_region(w, h)
                for _ in range(self.passes - 1):
                    p = self._run_region(frame, reg, flip=False, decode=False)
                    nxt = self._region_from_pass(p)
                    if nxt is None:  # no usable alignment points: stop refining the crop
                        break
                    earlier, reg = p, nxt
        final = self._run_region(frame, reg, flip=self.flip)
        return self._result(final, frame.shape, earlier, with_flip=self.flip)

    def _region_from_previous(self, previous) -> Region | None:
        if previous is None:
            return None
        prev = np.asarray(previous, dtype=float)
        if prev.shape != (self.skeleton.num_keypoints, 3):
            raise ValueError(f"previous must be ({self.skeleton.num_keypoints}, 3), got {prev.shape}")
        reg = region_from_keypoints(prev[:, :2], prev[:, 2] > 0, margin=self.crop_margin,
                                    upright_axis=self._axis, source="neighbour", min_size=8.0)
        return reg

    def _region_from_pass(self, p: dict) -> Region | None:
        pts = model_to_frame(p["lm"][[AUX_HIP_CENTRE, AUX_SCALE_POINT], :2], p["region"])
        reg = region_from_alignment(pts[0], pts[1], scale=self.alignment_scale, source="first_pass")
        if reg is None or reg.w < 8.0:
            return None
        return reg

    def _result(self, p: dict, frame_shape, earlier: dict | None, *, with_flip: bool) -> PoseResult:
        """PoseResult from the final pass ``p``; ``earlier`` is the pass before it, if any."""
        h, w = frame_shape[:2]
        k = self.skeleton.num_keypoints
        cov, idx = self._covered, self._map[self._covered]
        region = p["region"]
        m = crop_to_frame_matrix(region, INPUT_SIZE, INPUT_SIZE)
        lm = p["lm"]

        xy_all = model_to_frame(lm[:, :2], region, m)       # (39, 2) frame pixels
        vis_all = _sigmoid(lm[:, 3])
        pres_all = _sigmoid(lm[:, 4])
        have_flip = with_flip and "lm_flip" in p
        if have_flip:
            xy_flip = model_to_frame(p["lm_flip"][:, :2], region, m)
            flip_dist = np.hypot(*(xy_flip - xy_all).T)
            if self.flip_average:
                xy_all = (xy_all + xy_flip) / 2.0
                vis_all = (vis_all + _sigmoid(p["lm_flip"][:, 3])) / 2.0
                pres_all = (pres_all + _sigmoid(p["lm_flip"][:, 4])) / 2.0

        kp = np.zeros((k, 3))
        conf = np.zeros(k)
        vis = np.full(k, np.nan)
        pres = np.full(k, np.nan)
        kp[cov, :2] = xy_all[idx]
        vis[cov] = vis_all[idx]
        pres[cov] = pres_all[idx]
        conf[cov] = vis_all[idx] * pres_all[idx]
        x, y = kp[:, 0], kp[:, 1]
        inside = cov & (x >= 0) & (x <= w - 1) & (y >= 0) & (y <= h - 1)
        v = np.where(conf >= self.visible_threshold, 2, 1)
        v = np.where(inside & (np.where(np.isnan(pres), 0.0, pres) >= self.absent_threshold), v, 0)
        kp[:, 2] = v

        pts = kp[cov, :2]
        ext = pts.max(axis=0) - pts.min(axis=0)
        scale = float(np.sqrt(max(ext[0] * ext[1], 1.0)))

        signals = {"presence": pres, "visibility": vis}
        flip_d = np.full(k, np.nan)
        if have_flip:
            flip_d[cov] = flip_dist[idx] / scale
        signals["flip_disagreement"] = flip_d
        ent = np.full(k, np.nan)
        # only the channels the skeleton uses
        # (float32 is enough here: the entropy works in float32 anyway)
        if "maps" in p and self._entropy_rows is not None:
            chans = p["maps"][self._entropy_rows]          # a copy: the sigmoid may overwrite it
        else:
            chans = np.moveaxis(p["heatmaps"][..., idx], -1, 0).astype(np.float32)
        ent[cov] = multipeak_entropy(_sigmoid_inplace(chans.astype(np.float32, copy=False)))
        signals["heatmap_entropy"] = ent
        pass_d = np.full(k, np.nan)
        if earlier is not None:
            # on the regressed points of both passes: the heatmap decoding does not enter it
            xy_1 = model_to_frame(earlier["lm_regressed"][:, :2], earlier["region"])
            xy_2 = model_to_frame(p["lm_regressed"][:, :2], region, m)
            pass_d[cov] = np.hypot(*(xy_1[idx] - xy_2[idx]).T) / scale
        signals["pass_disagreement"] = pass_d
        # the regression head's own points (frame pixels; averaged with the mirror's like the
        # reported ones), before heatmap decoding: the per-project correction can learn from
        # where the two disagree
        reg_xy = model_to_frame(p["lm_regressed"][:, :2], region, m)
        if have_flip and self.flip_average:
            reg_xy = (reg_xy + model_to_frame(p["lm_flip_regressed"][:, :2], region, m)) / 2.0
        for n, c in (("regressed_x", 0), ("regressed_y", 1)):
            col = np.full(k, np.nan)
            col[cov] = reg_xy[idx, c]
            signals[n] = col

        score = float(p["flag"] * conf[cov].mean())
        emb = None
        if "features" in p:
            f = np.asarray(p["features"], dtype=np.float64)
            vec = f.reshape(f.shape[0], -1).mean(axis=1)
            norm = float(np.linalg.norm(vec))
            emb = (vec / norm if norm > 0 else vec).astype(np.float32)
        return PoseResult(keypoints=kp, confidence=conf, signals=signals, region=region,
                          score=score, embedding=emb)


# --- helpers --------------------------------------------------------------------------

def _dark_points(lm: np.ndarray, heatmaps: np.ndarray, channels: np.ndarray, *,
                 maps: np.ndarray | None = None) -> np.ndarray:
    """Body points' x, y from their heatmaps by DARK (:func:`decode.dark_decode`).

    ``lm`` (B, 39, 5) regressed landmarks of B crops, ``heatmaps`` (B, 64, 64,
    39) logits; only ``channels`` (body points, 0-32) are decoded, from the
    sigmoid of the logits with DARK's default kernel (11, sigma 2 cells: the
    paper's setting for 64 x 48 maps, from memory; this model's training
    Gaussian is not published). Heatmap cell j covers input pixels [4j, 4j + 4), so a decoded
    cell coordinate c is input pixel 4 (c + 0.5) (the convention of
    :func:`_refine`). A channel with no peak keeps the regressed point.
    ``maps``: those channels already gathered by :func:`_channel_major`.
    """
    out = np.array(lm, dtype=np.float64, copy=True)
    if len(channels) == 0:
        return out
    hms = np.asarray(heatmaps)
    b, hh, ww = hms.shape[:3]
    stride = INPUT_SIZE / ww
    # (B * C, 64, 64): every crop's chosen channels in one call; the sigmoid only on the
    # cells the decoding reads
    if maps is None:
        maps = _channel_major(hms, channels)
    maps = maps.reshape(b * len(channels), hh, ww)
    res = dark_decode(maps, transform=_sigmoid)
    xy = ((res.coords + 0.5) * stride).reshape(b, len(channels), 2)
    keep = ~res.no_peak.reshape(b, len(channels))
    sel = out[:, channels, :2]
    sel[keep] = xy[keep]
    out[:, channels, :2] = sel
    return out


def _refine(lm: np.ndarray, heatmaps: np.ndarray, *, kernel: int = 7,
            min_confidence: float = 0.5) -> np.ndarray:
    """Refine body points from their heatmaps (the refinement step of the BlazePose pipeline).

    As the published MediaPipe pose pipeline does after the landmark model
    (from its documentation and graph: kernel 7, minimum confidence 0.5): for
    each point, take the ``kernel`` x ``kernel`` window of its sigmoid heatmap
    around the regressed position; if the window's maximum reaches
    ``min_confidence``, replace the position by the window's weighted mean.
    Heatmap cell (i, j) is taken to cover input pixels [4j, 4j + 4) x [4i, 4i + 4)
    (model coordinates, edges at 0 and 256), so its centre is 4j + 2 (a project
    choice: the geometric cell centre). Only points 0-32.

    ``lm`` (39, 5) with ``heatmaps`` (64, 64, 39) logits, or a batch of crops:
    (B, 39, 5) with (B, 64, 64, 39).
    """
    lm = np.asarray(lm, dtype=np.float64)
    hms = np.asarray(heatmaps)
    single = lm.ndim == 2
    if single:                       # one crop: (39, 5) and (64, 64, 39)
        lm, hms = lm[None], hms[None]
    out = lm.copy()
    hh, ww = hms.shape[1:3]
    stride = INPUT_SIZE / ww
    half = (kernel - 1) // 2
    # all windows of all crops at once: cells outside the heatmap weigh nothing, exactly
    # as a per-point slice would cut them
    cx, cy = lm[:, :NUM_BODY, 0] / stride, lm[:, :NUM_BODY, 1] / stride
    ok = np.isfinite(cx) & np.isfinite(cy)
    col = np.floor(np.where(ok, cx, -1)).astype(int)
    row = np.floor(np.where(ok, cy, -1)).astype(int)
    ok &= (col >= 0) & (col < ww) & (row >= 0) & (row < hh)
    if ok.any():
        bb, pts = np.nonzero(ok)                            # crop and point of each window
        offs = np.arange(-half, half + 1)
        rr = row[bb, pts][:, None] + offs[None, :]          # (P, k)
        cc = col[bb, pts][:, None] + offs[None, :]
        inside = (((rr >= 0) & (rr < hh))[:, :, None]) & (((cc >= 0) & (cc < ww))[:, None, :])
        raw = hms[bb[:, None, None], np.clip(rr, 0, hh - 1)[:, :, None],
                  np.clip(cc, 0, ww - 1)[:, None, :], pts[:, None, None]]   # (P, k, k)
        win = np.where(inside, _sigmoid(raw), 0.0)
        total = win.sum(axis=(1, 2))
        use = (total > 0) & (win.max(axis=(1, 2)) >= min_confidence)
        if use.any():
            w = win[use]
            t = total[use]
            out[bb[use], pts[use], 0] = ((w * cc[use][:, None, :]).sum(axis=(1, 2)) / t + 0.5) * stride
            out[bb[use], pts[use], 1] = ((w * rr[use][:, :, None]).sum(axis=(1, 2)) / t + 0.5) * stride
    return out[0] if single else out


def _edit_graph(onnx, proto, want_embedding: bool, *, batch: bool = True):
    """Return (serialized model, embedding tensor name or None) with in-memory edits.

    * ``batch``: make the batch dimension dynamic (the converted graph fixes it
      at 1; its reshapes to (1, ...) become (-1, ...)), so the crop and its
      mirror run in one call.
    * embedding: expose the input of the graph's first Resize node as an extra
      output. In this model that is the 48-channel 8x8 map (NCHW) that a 1x1
      convolution makes from the deepest 864-channel backbone features before
      the heatmap decoder upsamples it: late, low-resolution and compact, so its
      global average is a short (48-d) summary of the crop's content. It is
      located by structure, not by name, because tf2onnx's names vary between
      conversions, and accepted only if shape inference says it is 4-D with a
      spatial size of at most 16.
    """
    from onnx import helper, numpy_helper, shape_inference

    graph = proto.graph
    if batch:
        dims = [graph.input[0].type.tensor_type.shape.dim[0]] + \
               [o.type.tensor_type.shape.dim[0] for o in graph.output
                if len(o.type.tensor_type.shape.dim)]
        for d in dims:
            d.dim_param = "N"
        inits = {t.name: t for t in graph.initializer}
        for node in graph.node:
            if node.op_type == "Reshape" and len(node.input) > 1 and node.input[1] in inits:
                t = inits[node.input[1]]
                a = numpy_helper.to_array(t).copy()
                if a.ndim == 1 and a.size > 1 and a[0] == 1:
                    a[0] = -1
                    t.CopyFrom(numpy_helper.from_array(a, t.name))
    name = None
    if want_embedding:
        resize = next((n for n in graph.node if n.op_type == "Resize"), None)
        if resize is not None:
            cand = resize.input[0]
            inferred = shape_inference.infer_shapes(proto)
            info = {v.name: v for v in inferred.graph.value_info}
            if cand in info:
                dims = [d.dim_value for d in info[cand].type.tensor_type.shape.dim]
                if len(dims) == 4 and 0 < dims[2] <= 16 and 0 < dims[3] <= 16:
                    graph.output.append(helper.make_tensor_value_info(
                        cand, onnx.TensorProto.FLOAT, None))
                    name = cand
    return proto.SerializeToString(), name


def _batch_works(sess) -> bool:
    try:
        inp = sess.get_inputs()[0]
        outs = sess.run(None, {inp.name: np.zeros((2, INPUT_SIZE, INPUT_SIZE, 3), np.float32)})
        return all(o.shape[0] == 2 for o in outs)
    except Exception:
        return False


def _as_bgr(frame) -> np.ndarray:
    f = np.asarray(frame)
    if f.dtype != np.uint8:
        raise ValueError(f"frames must be uint8 images, got {f.dtype}")
    if f.ndim == 2:
        return np.repeat(f[:, :, None], 3, axis=2)
    if f.ndim == 3 and f.shape[2] == 4:
        return np.ascontiguousarray(f[:, :, :3])
    if f.ndim == 3 and f.shape[2] == 3:
        return f
    raise ValueError(f"frames must be (H, W, 3) BGR, (H, W, 4) or (H, W), got {f.shape}")


def _one_line(e: Exception) -> str:
    text = str(e).strip().splitlines()
    return (text[0] if text else type(e).__name__)[:200]
