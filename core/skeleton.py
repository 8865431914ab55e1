"""Keypoint schemas: names, edges, left/right flip pairs and OKS sigmas.

COCO-17 is built in. Custom skeletons load from a small JSON file::

    {"name": "coco17_feet",
     "keypoints": ["nose", ...],
     "edges": [["left_hip", "left_knee"], ...],          # names or 0-based indices
     "flip_pairs": [["left_heel", "right_heel"], ...],   # optional; else derived from left_/right_ names
     "sigmas": [0.026, ...]}                              # optional; one per keypoint

Every problem is reported with the field that is wrong.
"""
from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .errors import KinemarkError

# Source: the COCO keypoint detection task definition (cocodataset.org,
# "Keypoint Evaluation"), and the same order in the person category of the
# COCO 2017 annotation files (person_keypoints_*.json).
COCO17_KEYPOINTS = (
    "nose", "left_eye", "right_eye", "left_ear", "right_ear",
    "left_shoulder", "right_shoulder", "left_elbow", "right_elbow",
    "left_wrist", "right_wrist", "left_hip", "right_hip",
    "left_knee", "right_knee", "left_ankle", "right_ankle",
)

# Source: the "skeleton" field of the person category in the COCO 2017
# keypoint annotation files; 1-based there, converted to 0-based here.
_COCO17_SKELETON_1BASED = (
    (16, 14), (14, 12), (17, 15), (15, 13), (12, 13), (6, 12), (7, 13),
    (6, 7), (6, 8), (7, 9), (8, 10), (9, 11), (2, 3), (1, 2), (1, 3),
    (2, 4), (3, 5), (4, 6), (5, 7),
)
COCO17_EDGES = tuple((a - 1, b - 1) for a, b in _COCO17_SKELETON_1BASED)

# Source: the per-keypoint OKS constants of the COCO keypoint evaluation
# (cocodataset.org "Keypoint Evaluation", and pycocotools/cocoeval.py,
# Params.setKpParams: kpt_oks_sigmas = [.26, .25, .25, .35, .35, .79, .79, .72,
# .72, .62, .62, 1.07, 1.07, .87, .87, .89, .89] / 10.0).
COCO17_SIGMAS = np.array(
    [.26, .25, .25, .35, .35, .79, .79, .72, .72, .62, .62,
     1.07, 1.07, .87, .87, .89, .89]) / 10.0

# Used for custom keypoints that have no published sigma and none given in the
# JSON file: the mean of the COCO-17 sigmas (a project choice, not a standard).
DEFAULT_SIGMA = float(COCO17_SIGMAS.mean())


@dataclass(frozen=True)
class Skeleton:
    """A keypoint schema. Indices are 0-based positions in ``keypoints``."""

    name: str
    keypoints: tuple[str, ...]
    edges: tuple[tuple[int, int], ...]
    flip_pairs: tuple[tuple[int, int], ...]
    sigmas: tuple[float, ...]

    def __post_init__(self):
        k = len(self.keypoints)
        if len(self.sigmas) != k:
            raise ValueError("one sigma per keypoint")

    @property
    def num_keypoints(self) -> int:
        return len(self.keypoints)

    @property
    def sigma_array(self) -> np.ndarray:
        return np.asarray(self.sigmas, dtype=float)

    def index(self, name: str) -> int:
        try:
            return self.keypoints.index(name)
        except ValueError:
            raise KinemarkError(f"skeleton {self.name!r} has no keypoint {name!r}") from None

    def flip_permutation(self) -> np.ndarray:
        """Index array that swaps left and right keypoints (for mirrored images)."""
        perm = np.arange(self.num_keypoints)
        for a, b in self.flip_pairs:
            perm[a], perm[b] = b, a
        return perm

    def to_dict(self) -> dict:
        return {
            "name": self.name,
            "keypoints": list(self.keypoints),
            "edges": [list(e) for e in self.edges],
            "flip_pairs": [list(p) for p in self.flip_pairs],
            "sigmas": [float(s) for s in self.sigmas],
        }

    def to_json(self) -> str:
        return json.dumps(self.to_dict(), sort_keys=True)

    @classmethod
    def from_dict(cls, data, *, source: str = "skeleton") -> "Skeleton":
        return _parse(data, source)


def derive_flip_pairs(names) -> tuple[tuple[int, int], ...]:
    """Pair every ``left_X`` with ``right_X`` (the naming of COCO and BlazePose)."""
    pairs = []
    for i, n in enumerate(names):
        if n.startswith("left_"):
            other = "right_" + n[len("left_"):]
            if other in names:
                pairs.append((i, names.index(other)))
    return tuple(pairs)


COCO17 = Skeleton(
    name="coco17",
    keypoints=COCO17_KEYPOINTS,
    edges=COCO17_EDGES,
    flip_pairs=derive_flip_pairs(COCO17_KEYPOINTS),
    sigmas=tuple(float(s) for s in COCO17_SIGMAS),
)

BUILTIN = {"coco17": COCO17}


def _fail(source, field, msg):
    raise KinemarkError(msg, where=f"{source}, field '{field}'")


def _parse(data, source: str) -> Skeleton:
    if not isinstance(data, dict):
        raise KinemarkError("a skeleton must be a JSON object", where=source)
    name = data.get("name")
    if not isinstance(name, str) or not name.strip():
        _fail(source, "name", "must be a non-empty string")
    kps = data.get("keypoints")
    if not isinstance(kps, list) or not kps:
        _fail(source, "keypoints", "must be a non-empty list of names")
    for i, k in enumerate(kps):
        if not isinstance(k, str) or not k.strip():
            _fail(source, f"keypoints[{i}]", "must be a non-empty string")
    if len(set(kps)) != len(kps):
        dup = sorted({k for k in kps if kps.count(k) > 1})
        _fail(source, "keypoints", f"duplicate names: {', '.join(dup)}")
    n = len(kps)

    def resolve(ref, field):
        if isinstance(ref, bool):
            _fail(source, field, f"{ref!r} is not a keypoint name or index")
        if isinstance(ref, int):
            if not 0 <= ref < n:
                _fail(source, field, f"index {ref} out of range 0..{n - 1}")
            return ref
        if isinstance(ref, str):
            if ref not in kps:
                _fail(source, field, f"unknown keypoint {ref!r}")
            return kps.index(ref)
        _fail(source, field, f"{ref!r} is not a keypoint name or index")

    def pairs(field, required):
        raw = data.get(field)
        if raw is None:
            if required:
                _fail(source, field, "is missing")
            return None
        if not isinstance(raw, list):
            _fail(source, field, "must be a list of [a, b] pairs")
        out = []
        for i, p in enumerate(raw):
            if not isinstance(p, list) or len(p) != 2:
                _fail(source, f"{field}[{i}]", "must be a pair [a, b]")
            a, b = resolve(p[0], f"{field}[{i}][0]"), resolve(p[1], f"{field}[{i}][1]")
            if a == b:
                _fail(source, f"{field}[{i}]", "joins a keypoint to itself")
            out.append((a, b))
        return tuple(out)

    edges = pairs("edges", required=False) or ()
    flips = pairs("flip_pairs", required=False)
    if flips is None:
        flips = derive_flip_pairs(list(kps))
    else:
        seen = [i for p in flips for i in p]
        if len(seen) != len(set(seen)):
            _fail(source, "flip_pairs", "a keypoint appears in more than one pair")
    sig = data.get("sigmas")
    if sig is None:
        coco = dict(zip(COCO17_KEYPOINTS, COCO17_SIGMAS))
        sig = [float(coco.get(k, DEFAULT_SIGMA)) for k in kps]
    else:
        if not isinstance(sig, list) or len(sig) != n:
            _fail(source, "sigmas", f"must be a list of {n} numbers, one per keypoint")
        for i, s in enumerate(sig):
            if isinstance(s, bool) or not isinstance(s, (int, float)) or not (0 < s < 10):
                _fail(source, f"sigmas[{i}]", f"{s!r} is not a positive number")
        sig = [float(s) for s in sig]
    return Skeleton(name=name.strip(), keypoints=tuple(kps), edges=edges,
                    flip_pairs=flips, sigmas=tuple(sig))


def load_skeleton(spec: str | Path) -> Skeleton:
    """A built-in name (``coco17``) or the path of a skeleton JSON file."""
    if isinstance(spec, str) and spec in BUILTIN:
        return BUILTIN[spec]
    path = Path(spec)
    if not path.exists():
        raise KinemarkError(
            f"no built-in skeleton {str(spec)!r} and no such file (built in: {', '.join(BUILTIN)})")
    from .jsonfile import read_json
    return _parse(read_json(path, what="skeleton file"), str(path))
