"""The model-adapter interface: what every pose model looks like to the rest of Kinemark.

An adapter loads one model, knows which keypoints of the project's skeleton it
covers, and predicts on one frame and region. Frames are BGR uint8 arrays as
OpenCV decodes them; keypoints come back in frame pixels in the skeleton's
order.
"""
from __future__ import annotations

from abc import ABC, abstractmethod
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..media import file_sha256  # noqa: F401  (re-exported: adapters hash their model file)
from ..skeleton import Skeleton


@dataclass(frozen=True)
class Region:
    """A rotated rectangle in frame pixels: centre, size, rotation.

    ``angle`` is in radians. The region's own x axis points along
    (cos a, sin a) in frame pixels and its y axis along (-sin a, cos a), so
    ``angle = 0`` is an upright, axis-aligned box.
    """

    cx: float
    cy: float
    w: float
    h: float
    angle: float = 0.0
    source: str = "frame"  # where it came from: drawn | neighbour | first_pass | frame

    def with_aspect(self, aspect_w_over_h: float) -> "Region":
        """Grow the shorter side so w/h equals the model input's aspect."""
        w, h = self.w, self.h
        if w / h < aspect_w_over_h:
            w = h * aspect_w_over_h
        else:
            h = w / aspect_w_over_h
        return Region(self.cx, self.cy, w, h, self.angle, self.source)


@dataclass(frozen=True)
class PoseResult:
    """One prediction on one frame region.

    keypoints: (K, 3) float, x, y in frame pixels, v in COCO's 0/1/2 sense
        (0 where the model says the point is absent or the skeleton keypoint is
        not covered by the model).
    confidence: (K,) in [0, 1], the model's own per-joint confidence (0 for
        keypoints the model does not cover).
    signals: per-joint uncertainty signals, each (K,) float, NaN where not
        computed. Names used across Kinemark:
          ``flip_disagreement``  distance between the prediction and the
                                 un-mirrored prediction on the mirrored crop,
                                 divided by the subject's scale (sqrt of box area)
          ``heatmap_entropy``    multiple-peak entropy of the joint's heatmap
          ``presence``           the model's visibility/presence probability
          ``pass_disagreement``  first pass vs second pass distance / scale
    region: the region the keypoints were predicted in.
    score: a whole-pose confidence in [0, 1] (COCO results "score").
    embedding: optional short appearance vector from inside the model.
    """

    keypoints: np.ndarray
    confidence: np.ndarray
    signals: dict = field(default_factory=dict)
    region: Region | None = None
    score: float = 0.0
    embedding: np.ndarray | None = None


class PoseAdapter(ABC):
    """Base class for pose model adapters."""

    #: short stable identifier, e.g. "blazepose-ghum-full"
    model_id: str = "unknown"
    #: True for a model a project has tuned on its own labels (core.tuning): its points are
    #: pre-filled as adapted, and its proposals are stored apart from the raw model's
    adapted: bool = False

    def __init__(self, skeleton: Skeleton):
        self.skeleton = skeleton

    @property
    @abstractmethod
    def model_hash(self) -> str:
        """sha256 (hex) of the model file, so proposals record exactly which model made them."""

    @abstractmethod
    def covered(self) -> np.ndarray:
        """(K,) bool: which of the skeleton's keypoints this model predicts."""

    @abstractmethod
    def predict(self, frame_bgr: np.ndarray, region: Region | None = None, *,
                previous: np.ndarray | None = None) -> PoseResult:
        """Predict keypoints on ``frame_bgr``.

        ``region``: a region the annotator drew, if any. ``previous``: the
        (K, 3) pose on a neighbouring frame of the same video, used to build
        the crop when no region is given.
        """

    def describe(self) -> dict:
        return {"model_id": self.model_id, "model_hash": self.model_hash,
                "keypoints": [n for n, c in zip(self.skeleton.keypoints, self.covered()) if c]}


def session_options(threads: int | None):
    """ONNX Runtime options shared by every adapter.

    ``threads``: intra-op threads (None: ONNX Runtime's default). The pool's
    threads do not spin-wait between calls (``session.intra_op.allow_spinning``
    = 0, an ONNX Runtime session setting): pre-fill does its decoding, crops and
    storing between model calls, and spinning threads took a core from that work.
    Measured on this 2-core machine with ``kinemark bench propose``: about 8 %
    more frames per second through the pipeline, inference alone unchanged.
    """
    import onnxruntime as ort

    so = ort.SessionOptions()
    so.log_severity_level = 3
    if threads:
        so.intra_op_num_threads = int(threads)
        so.inter_op_num_threads = 1
    so.add_session_config_entry("session.intra_op.allow_spinning", "0")
    return so
