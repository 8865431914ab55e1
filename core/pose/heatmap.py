"""A generic top-down heatmap model exported to ONNX, described by a JSON file beside it.

For ``mymodel.onnx`` the description is ``mymodel.kinemark.json``::

    {
      "kinemark_heatmap_model": 1,
      "model_id": "quillon-reach-v3",                # optional; default: file stem
      "input": {
        "name": "image",                             # ONNX input, float32, NCHW
        "width": 192, "height": 256,                 # model input size in pixels
        "colour_order": "RGB",                       # "RGB" or "BGR": channel order fed to the model
        "pixel_units": "0-255",                      # units of mean/std: "0-255" or "0-1"
        "mean": [123.675, 116.28, 103.53],           # per channel, in the model's colour order
        "std": [58.395, 57.12, 57.375]
      },
      "output": {
        "name": "heatmaps",                          # ONNX output shaped (N, K, H/stride, W/stride)
        "stride": 4,                                 # input pixels per heatmap cell
        "sigma": 2.0                                 # optional; training Gaussian, in heatmap cells
      },
      "keypoints": ["nose", "left_eye", ...],        # one name per output channel
      "flip_pairs": [["left_eye", "right_eye"], ...] # optional; else left_X <-> right_X by name
    }

Normalisation: with ``"pixel_units": "0-255"`` the model sees
``(pixel - mean) / std`` with pixel the 8-bit value; with ``"0-1"`` it sees
``(pixel / 255 - mean) / std``.

Pixel-centre convention: model-input pixel u has its centre at integer u
(OpenCV's convention, as in :mod:`.crop`); heatmap cell i covers input pixels
[i * stride - 0.5, (i + 1) * stride - 0.5], so its centre is the input pixel
(i + 0.5) * stride - 0.5.
"""
from __future__ import annotations

import math
from pathlib import Path

import cv2
import numpy as np

from ..errors import KinemarkError
from ..jsonfile import read_json
from ..skeleton import Skeleton, derive_flip_pairs
from .base import PoseAdapter, PoseResult, Region, file_sha256, session_options
from .crop import apply_affine, crop_to_frame_matrix, extract_crop, whole_frame_region
from .decode import dark_decode, multipeak_entropy

CONFIG_SUFFIX = ".kinemark.json"
CONFIG_VERSION = 1

# Used when the config gives no sigma: a 2-cell Gaussian is common practice for
# 64x48 heatmaps of top-down models (a convention, not a standard).
DEFAULT_SIGMA = 2.0


def config_path_for(model_path: str | Path) -> Path:
    """``mymodel.onnx`` -> ``mymodel.kinemark.json`` (same folder)."""
    p = Path(model_path)
    return p.with_name(p.stem + CONFIG_SUFFIX)


class HeatmapModelConfig:
    """The validated JSON description of a heatmap model (see the module docstring)."""

    def __init__(self, data, *, source: str = "model config"):
        self.source = source
        if not isinstance(data, dict):
            raise KinemarkError("the model description must be a JSON object", where=source)
        version = data.get("kinemark_heatmap_model")
        if version != CONFIG_VERSION:
            self._fail("kinemark_heatmap_model",
                       f"must be {CONFIG_VERSION} (the format version), got {version!r}")
        mid = data.get("model_id")
        if mid is not None and (not isinstance(mid, str) or not mid.strip()):
            self._fail("model_id", "must be a non-empty string if given")
        self.model_id: str | None = mid.strip() if mid else None

        inp = data.get("input")
        if not isinstance(inp, dict):
            self._fail("input", "must be an object with name, width, height, colour_order, "
                                "pixel_units, mean, std")
        self.input_name = self._str(inp, "name", "input.name")
        self.input_width = self._posint(inp, "width", "input.width")
        self.input_height = self._posint(inp, "height", "input.height")
        order = inp.get("colour_order")
        if order not in ("RGB", "BGR"):
            self._fail("input.colour_order", f'must be "RGB" or "BGR", got {order!r}')
        self.colour_order: str = order
        units = inp.get("pixel_units")
        if units not in ("0-255", "0-1"):
            self._fail("input.pixel_units", f'must be "0-255" or "0-1", got {units!r}')
        self.pixel_units: str = units
        self.mean = self._triple(inp, "mean", "input.mean", positive=False)
        self.std = self._triple(inp, "std", "input.std", positive=True)

        out = data.get("output")
        if not isinstance(out, dict):
            self._fail("output", "must be an object with name, stride and optional sigma")
        self.output_name = self._str(out, "name", "output.name")
        self.stride = self._posint(out, "stride", "output.stride")
        for dim, field in ((self.input_width, "input.width"), (self.input_height, "input.height")):
            if dim % self.stride:
                self._fail("output.stride", f"{self.stride} does not divide {field} ({dim})")
        sigma = out.get("sigma")
        if sigma is not None:
            if isinstance(sigma, bool) or not isinstance(sigma, (int, float)) \
                    or not math.isfinite(sigma) or not 0 < sigma <= 50:
                self._fail("output.sigma", f"must be a positive number of heatmap cells, got {sigma!r}")
            sigma = float(sigma)
        self.sigma: float | None = sigma

        kps = data.get("keypoints")
        if not isinstance(kps, list) or not kps:
            self._fail("keypoints", "must be a non-empty list of names, one per output channel")
        for i, k in enumerate(kps):
            if not isinstance(k, str) or not k.strip():
                self._fail(f"keypoints[{i}]", f"must be a non-empty string, got {k!r}")
        if len(set(kps)) != len(kps):
            dup = sorted({k for k in kps if kps.count(k) > 1})
            self._fail("keypoints", f"duplicate names: {', '.join(dup)}")
        self.keypoints: tuple[str, ...] = tuple(kps)

        raw = data.get("flip_pairs")
        if raw is None:
            pairs = derive_flip_pairs(list(kps))
        else:
            if not isinstance(raw, list):
                self._fail("flip_pairs", "must be a list of [name, name] pairs")
            pairs = []
            for i, p in enumerate(raw):
                if not (isinstance(p, list) and len(p) == 2 and all(isinstance(n, str) for n in p)):
                    self._fail(f"flip_pairs[{i}]", f"must be a pair of keypoint names, got {p!r}")
                for j, n in enumerate(p):
                    if n not in kps:
                        self._fail(f"flip_pairs[{i}][{j}]", f"unknown keypoint {n!r}")
                if p[0] == p[1]:
                    self._fail(f"flip_pairs[{i}]", "pairs a keypoint with itself")
                pairs.append((kps.index(p[0]), kps.index(p[1])))
            seen = [i for pr in pairs for i in pr]
            if len(seen) != len(set(seen)):
                self._fail("flip_pairs", "a keypoint appears in more than one pair")
        self.flip_pairs: tuple[tuple[int, int], ...] = tuple(pairs)

    # -- helpers -----------------------------------------------------------
    def _fail(self, field: str, msg: str):
        raise KinemarkError(msg, where=f"{self.source}, field '{field}'")

    def _str(self, obj, key, field) -> str:
        v = obj.get(key)
        if not isinstance(v, str) or not v:
            self._fail(field, f"must be a non-empty string, got {v!r}")
        return v

    def _posint(self, obj, key, field) -> int:
        v = obj.get(key)
        if isinstance(v, bool) or not isinstance(v, int) or v <= 0:
            self._fail(field, f"must be a positive integer, got {v!r}")
        return v

    def _triple(self, obj, key, field, *, positive) -> np.ndarray:
        v = obj.get(key)
        if not isinstance(v, list) or len(v) != 3:
            self._fail(field, f"must be a list of 3 numbers (one per channel), got {v!r}")
        for i, x in enumerate(v):
            if isinstance(x, bool) or not isinstance(x, (int, float)) or not math.isfinite(x) \
                    or (positive and x <= 0):
                kind = "positive number" if positive else "number"
                self._fail(f"{field}[{i}]", f"must be a {kind}, got {x!r}")
        return np.asarray(v, dtype=np.float32)

    @property
    def flip_permutation(self) -> np.ndarray:
        """Index array over the model's channels that swaps left and right."""
        perm = np.arange(len(self.keypoints))
        for a, b in self.flip_pairs:
            perm[a], perm[b] = b, a
        return perm

    @classmethod
    def load(cls, path: str | Path) -> "HeatmapModelConfig":
        path = Path(path)
        if not path.exists():
            raise KinemarkError("model description file not found (it must sit beside the "
                                f".onnx file and end in {CONFIG_SUFFIX})", where=str(path))
        return cls(read_json(path, what="model description"), source=str(path))


def _dim(d):
    """An ONNX shape entry as int, or None when symbolic / unknown."""
    return d if isinstance(d, int) and d > 0 else None


class HeatmapAdapter(PoseAdapter):
    """A fine-tuned top-down heatmap model (ONNX + JSON description), run on CPU.

    ``confidence_threshold``: a point whose confidence (heatmap maximum) is
    at least this is proposed visible (v=2), else occluded (v=1).
    ``flip_test``: also run the mirrored crop (flip test-time augmentation).
    ``margin``: fraction added to the width and height of the box around a
    ``previous`` pose to make the crop.
    """

    def __init__(self, model_path: str | Path, skeleton: Skeleton, *,
                 config_path: str | Path | None = None,
                 confidence_threshold: float = 0.3, flip_test: bool = True,
                 margin: float = 0.25, threads: int | None = None):
        super().__init__(skeleton)
        self.model_path = Path(model_path)
        if not 0.0 <= confidence_threshold <= 1.0:
            raise ValueError("confidence_threshold must be in [0, 1]")
        if margin < 0:
            raise ValueError("margin must be >= 0")
        self.confidence_threshold = float(confidence_threshold)
        self.flip_test = bool(flip_test)
        self.margin = float(margin)

        if not self.model_path.is_file():
            raise KinemarkError("model file not found", where=str(self.model_path))
        cfg_path = Path(config_path) if config_path is not None else config_path_for(self.model_path)
        self.config = HeatmapModelConfig.load(cfg_path)
        cfg = self.config
        self.model_id = cfg.model_id or self.model_path.stem

        # Map the skeleton's keypoints to the model's channels by name.
        names = {n: i for i, n in enumerate(cfg.keypoints)}
        self._channel = np.array([names.get(n, -1) for n in skeleton.keypoints], dtype=np.int64)
        if not (self._channel >= 0).any():
            raise KinemarkError(
                f"the model's keypoints share no name with skeleton {skeleton.name!r}. "
                f"Model: {', '.join(cfg.keypoints)}. Skeleton: {', '.join(skeleton.keypoints)}",
                where=str(cfg_path))

        self._session = self._open_session(threads)
        self._hash = file_sha256(self.model_path)

    # -- loading -----------------------------------------------------------
    def _open_session(self, threads):
        import onnxruntime as ort

        cfg = self.config
        where = str(self.model_path)
        opts = session_options(threads)
        try:
            sess = ort.InferenceSession(str(self.model_path), sess_options=opts,
                                        providers=["CPUExecutionProvider"])
        except Exception as e:  # onnxruntime raises its own classes for bad files
            first = str(e).strip().splitlines()[0] if str(e).strip() else type(e).__name__
            raise KinemarkError(f"cannot load the ONNX model (missing, truncated or corrupt "
                                f"file?): {first}", where=where) from None

        inputs = {i.name: i for i in sess.get_inputs()}
        if cfg.input_name not in inputs:
            raise KinemarkError(f"the model has no input {cfg.input_name!r} (field 'input.name'); "
                                f"its inputs are: {', '.join(inputs)}", where=where)
        if len(inputs) > 1:
            raise KinemarkError(f"the model needs more than one input ({', '.join(inputs)}); "
                                "only a single image input is supported", where=where)
        inp = inputs[cfg.input_name]
        if inp.type != "tensor(float)":
            raise KinemarkError(f"input {cfg.input_name!r} has type {inp.type}; a float32 "
                                "NCHW image is required", where=where)
        shape = list(inp.shape)
        if len(shape) != 4:
            raise KinemarkError(f"input {cfg.input_name!r} has shape {shape}; an NCHW "
                                "image (4 dimensions) is required", where=where)
        n, c, h, w = (_dim(d) for d in shape)
        if c is not None and c != 3:
            raise KinemarkError(f"input {cfg.input_name!r} has {c} channels; 3 are required "
                                "(NCHW layout)", where=where)
        if (h is not None and h != cfg.input_height) or (w is not None and w != cfg.input_width):
            raise KinemarkError(
                f"input {cfg.input_name!r} is {shape[3]}x{shape[2]} (width x height) but the "
                f"description says {cfg.input_width}x{cfg.input_height} "
                "(fields 'input.width', 'input.height')", where=where)
        self._batch_fixed = n  # None: any batch size

        outputs = {o.name: o for o in sess.get_outputs()}
        if cfg.output_name not in outputs:
            raise KinemarkError(f"the model has no output {cfg.output_name!r} (field "
                                f"'output.name'); its outputs are: {', '.join(outputs)}",
                                where=where)
        oshape = list(outputs[cfg.output_name].shape)
        if len(oshape) != 4:
            raise KinemarkError(f"output {cfg.output_name!r} has shape {oshape}; heatmaps "
                                "shaped (N, K, H, W) are required", where=where)
        self._check_output_shape([_dim(d) for d in oshape])
        return sess

    def _check_output_shape(self, shape):
        cfg = self.config
        where = str(self.model_path)
        _, k, h, w = shape
        if k is not None and k != len(cfg.keypoints):
            raise KinemarkError(
                f"output {cfg.output_name!r} has {k} heatmap channels but the description "
                f"lists {len(cfg.keypoints)} keypoints (field 'keypoints')", where=where)
        eh, ew = cfg.input_height // cfg.stride, cfg.input_width // cfg.stride
        if (h is not None and h != eh) or (w is not None and w != ew):
            raise KinemarkError(
                f"output {cfg.output_name!r} heatmaps are {w}x{h} (width x height) but input "
                f"{cfg.input_width}x{cfg.input_height} at stride {cfg.stride} gives {ew}x{eh} "
                "(field 'output.stride')", where=where)

    # -- PoseAdapter -------------------------------------------------------
    @property
    def model_hash(self) -> str:
        return self._hash

    def covered(self) -> np.ndarray:
        return self._channel >= 0

    @property
    def input_size(self) -> tuple[int, int]:
        """(width, height) of the model input."""
        return self.config.input_width, self.config.input_height

    def preprocess(self, crop_bgr: np.ndarray) -> np.ndarray:
        """A BGR uint8 crop (H, W, 3) -> the model's (3, H, W) float32 input."""
        cfg = self.config
        img = crop_bgr[:, :, ::-1] if cfg.colour_order == "RGB" else crop_bgr
        x = img.astype(np.float32)
        if cfg.pixel_units == "0-1":
            x /= 255.0
        x = (x - cfg.mean) / cfg.std
        return np.ascontiguousarray(x.transpose(2, 0, 1), dtype=np.float32)

    def predict_raw(self, batch_nchw: np.ndarray) -> np.ndarray:
        """Inference only: (N, 3, H, W) float32 model input -> (N, K, H/stride, W/stride) heatmaps."""
        batch = np.ascontiguousarray(batch_nchw, dtype=np.float32)
        if self._batch_fixed is not None and batch.shape[0] != self._batch_fixed:
            parts = [self._run(batch[i:i + self._batch_fixed])
                     for i in range(0, batch.shape[0], self._batch_fixed)]
            return np.concatenate(parts, axis=0)
        return self._run(batch)

    def _run(self, batch):
        cfg = self.config
        out = self._session.run([cfg.output_name], {cfg.input_name: batch})[0]
        out = np.asarray(out)
        if out.ndim != 4 or out.shape[0] != batch.shape[0]:
            raise KinemarkError(f"output {cfg.output_name!r} came back shaped {out.shape}; "
                                f"expected ({batch.shape[0]}, K, H, W)", where=str(self.model_path))
        self._check_output_shape(list(out.shape))
        return out.astype(np.float32, copy=False)

    def region_from_previous(self, previous: np.ndarray) -> Region | None:
        """Box around a neighbouring frame's labelled points, grown by ``margin``; None if < 2 points."""
        prev = np.asarray(previous, dtype=float)
        if prev.shape != (self.skeleton.num_keypoints, 3):
            raise ValueError(f"previous must be shaped ({self.skeleton.num_keypoints}, 3), "
                             f"got {prev.shape}")
        pts = prev[(prev[:, 2] > 0) & np.isfinite(prev[:, :2]).all(axis=1), :2]
        if len(pts) < 2:
            return None
        lo, hi = pts.min(axis=0), pts.max(axis=0)
        w, h = hi - lo
        side = max(w, h)
        if side < 1.0:
            return None
        # a nearly one-dimensional pose (e.g. a straight arm) still gets a usable box
        w, h = max(w, 0.25 * side), max(h, 0.25 * side)
        c = (lo + hi) / 2.0
        return Region(float(c[0]), float(c[1]), float(w * (1 + self.margin)),
                      float(h * (1 + self.margin)), 0.0, "neighbour")

    def predict(self, frame_bgr: np.ndarray, region: Region | None = None, *,
                previous: np.ndarray | None = None) -> PoseResult:
        """Predict on one frame (see :meth:`PoseAdapter.predict`).

        Crop: ``region`` if given, else the box around ``previous`` plus the
        margin, else the whole frame letterboxed; grown to the input's aspect.
        With flip test on, the heatmaps of the plain crop and of the mirrored
        crop (un-mirrored, left/right channels swapped) are averaged and the
        average is decoded with DARK (common practice for flip test-time
        augmentation). Signals: ``flip_disagreement`` = distance between the
        two passes' separately decoded points / sqrt(area of the predicted
        points' box) (the region's area when that box has under 1 px^2, e.g.
        one-point models); ``heatmap_entropy`` = multiple-peak entropy of the
        plain crop's heatmap. Confidence = the decoded heatmap's maximum
        clipped to [0, 1] (0 for a channel without a peak). Points outside
        the frame get x = y = v = 0 but keep their confidence.
        """
        frame = np.asarray(frame_bgr)
        if frame.ndim == 2:
            frame = cv2.cvtColor(frame, cv2.COLOR_GRAY2BGR)
        elif frame.ndim == 3 and frame.shape[2] == 4:
            frame = frame[:, :, :3]
        if frame.ndim != 3 or frame.shape[2] != 3 or frame.size == 0:
            raise KinemarkError(f"expected a colour image (H, W, 3), got shape {frame.shape}")
        fh, fw = frame.shape[:2]
        cfg = self.config
        iw, ih = cfg.input_width, cfg.input_height

        if region is not None:
            if not (math.isfinite(region.w) and math.isfinite(region.h)
                    and region.w > 0 and region.h > 0):
                raise KinemarkError(f"the region has no area ({region.w} x {region.h} pixels)")
        elif previous is not None:
            region = self.region_from_previous(previous)
        if region is None:
            region = whole_frame_region(fw, fh)
        region = region.with_aspect(iw / ih)

        crop = extract_crop(frame, region, iw, ih)
        x = self.preprocess(crop)
        if self.flip_test:
            # mirrored crop: input pixel u <-> iw - 1 - u
            hms = self.predict_raw(np.stack([x, x[:, :, ::-1]]))
            hm, hm_mirror = hms[0], hms[1]
        else:
            hm = self.predict_raw(x[None])[0]
            hm_mirror = None

        kernel_sigma = cfg.sigma if cfg.sigma is not None else DEFAULT_SIGMA
        s = cfg.stride
        to_frame = crop_to_frame_matrix(region, iw, ih)

        def cells_to_frame(xy):
            return apply_affine(to_frame, (xy + 0.5) * s - 0.5)

        if hm_mirror is not None:
            # un-mirror (exact in heatmap cells because the stride divides the width)
            # and swap left/right channels
            hm_back = hm_mirror[:, :, ::-1][cfg.flip_permutation]
            d_main = dark_decode(hm, sigma=kernel_sigma)
            d_back = dark_decode(hm_back, sigma=kernel_sigma)
            d_final = dark_decode(0.5 * (hm + hm_back), sigma=kernel_sigma)
            xy_main, xy_back = cells_to_frame(d_main.coords), cells_to_frame(d_back.coords)
        else:
            d_final = dark_decode(hm, sigma=kernel_sigma)
        xy = cells_to_frame(d_final.coords)
        conf_m = np.clip(np.nan_to_num(d_final.maxvals, nan=0.0), 0.0, 1.0)
        conf_m[d_final.no_peak] = 0.0
        entropy_m = multipeak_entropy(hm)

        k_sk = self.skeleton.num_keypoints
        cov = self.covered()
        ch = self._channel[cov]
        keypoints = np.zeros((k_sk, 3))
        confidence = np.zeros(k_sk)
        confidence[cov] = conf_m[ch]
        pts = xy[ch]
        inside = ((pts[:, 0] >= -0.5) & (pts[:, 0] <= fw - 0.5)
                  & (pts[:, 1] >= -0.5) & (pts[:, 1] <= fh - 0.5))
        v = np.where(confidence[cov] >= self.confidence_threshold, 2.0, 1.0)
        v[~inside] = 0.0
        kp = np.column_stack([pts, v])
        kp[~inside, :2] = 0.0  # COCO stores x = y = 0 with v = 0
        keypoints[cov] = kp

        signals = {"heatmap_entropy": np.full(k_sk, np.nan), "flip_disagreement": np.full(k_sk, np.nan)}
        signals["heatmap_entropy"][cov] = entropy_m[ch]
        if hm_mirror is not None:
            scale = self._subject_scale(pts, region)
            dist = np.linalg.norm(xy_main[ch] - xy_back[ch], axis=1)
            dist[(d_main.no_peak | d_back.no_peak)[ch]] = np.nan  # no peak: nothing to compare
            signals["flip_disagreement"][cov] = dist / scale
        score = float(confidence[cov].mean())
        return PoseResult(keypoints=keypoints, confidence=confidence, signals=signals,
                          region=region, score=score)

    @staticmethod
    def _subject_scale(pts: np.ndarray, region: Region) -> float:
        """sqrt of the area of the predicted points' box; the region's if that box is degenerate."""
        w, h = pts.max(axis=0) - pts.min(axis=0)
        area = float(w * h)
        if not math.isfinite(area) or area < 1.0:
            area = region.w * region.h
        return math.sqrt(area)
