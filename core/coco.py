"""COCO keypoint files: export, the results format, and a careful import.

The format is the one of the COCO keypoint task (cocodataset.org, "Data
format", keypoint detection): ``images``, ``annotations`` with flattened
``keypoints`` [x1, y1, v1, ...] in the category's keypoint order,
``num_keypoints``, ``bbox`` [x, y, w, h], ``area``, ``iscrowd``,
``category_id``, ``image_id``; ``categories`` with ``keypoints`` (names) and
``skeleton`` (1-based index pairs). Results files are a list of
``{image_id, category_id, keypoints, score}``.
"""
from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path, PurePosixPath, PureWindowsPath

import numpy as np

from .errors import KinemarkError
from .jsonfile import read_json
from .metrics import bbox_from_keypoints
from .skeleton import Skeleton

PERSON_CATEGORY_ID = 1
TOOL_VERSION = "0.1.0"


def frame_file_name(media_id: int, frame_index: int) -> str:
    """File name of an exported frame. Carries no original file name (privacy by default)."""
    return f"m{media_id:05d}_f{frame_index:06d}.png"


def category(skeleton: Skeleton) -> dict:
    return {
        "id": PERSON_CATEGORY_ID, "name": "person", "supercategory": "person",
        "keypoints": list(skeleton.keypoints),
        "skeleton": [[a + 1, b + 1] for a, b in skeleton.edges],
    }


def annotation_entry(ann_id: int, image_id: int, kps: np.ndarray, bbox, image_size) -> dict:
    k = np.asarray(kps, float).reshape(-1, 3)
    if bbox is None:
        bbox = bbox_from_keypoints(k, image_size=image_size) or (0.0, 0.0, 0.0, 0.0)
    x, y, w, h = (float(b) for b in bbox)
    return {
        "id": int(ann_id), "image_id": int(image_id), "category_id": PERSON_CATEGORY_ID,
        "keypoints": [v for x_, y_, v_ in k for v in (round(float(x_), 3), round(float(y_), 3), int(v_))],
        "num_keypoints": int(np.count_nonzero(k[:, 2] > 0)),
        "bbox": [round(x, 3), round(y, 3), round(w, 3), round(h, 3)],
        # Kinemark stores no segmentation, so area is the box area (a common choice
        # for keypoint-only data sets; COCO itself uses the segment's area).
        "area": round(w * h, 3),
        "iscrowd": 0,
    }


def build_coco(rows, skeleton: Skeleton, *, description: str = "Kinemark export",
               date_created: str | None = None) -> dict:
    """A COCO keypoints dict from ``Store.export_rows`` tuples."""
    images, annotations, seen = [], [], set()
    for (ann_id, frame_id, _person, kp_json, bbox_json, _state, media_id, frame_index,
         width, height, _code, _path, _ts) in rows:
        if frame_id not in seen:
            seen.add(frame_id)
            images.append({"id": int(frame_id), "file_name": frame_file_name(media_id, frame_index),
                           "width": int(width), "height": int(height)})
        kps = np.array(json.loads(kp_json), float)
        bbox = json.loads(bbox_json) if bbox_json else None
        annotations.append(annotation_entry(ann_id, frame_id, kps, bbox, (width, height)))
    return {
        "info": {"description": description, "version": TOOL_VERSION,
                 "date_created": date_created or datetime.now(timezone.utc).strftime("%Y-%m-%d")},
        "licenses": [],
        "images": images,
        "annotations": annotations,
        "categories": [category(skeleton)],
    }


def results_entry(image_id: int, kps: np.ndarray, score: float) -> dict:
    k = np.asarray(kps, float).reshape(-1, 3)
    return {"image_id": int(image_id), "category_id": PERSON_CATEGORY_ID,
            "keypoints": [v for x, y, c in k for v in (round(float(x), 3), round(float(y), 3), int(c))],
            "score": round(float(score), 6)}


# ---- import -------------------------------------------------------------------------

@dataclass
class Problem:
    where: str
    message: str

    def __str__(self):
        return f"{self.where}: {self.message}"


@dataclass
class ImportPlan:
    """What a COCO file would add, and what is wrong with it."""

    images: list = field(default_factory=list)        # (coco image id, Path on disk, width, height)
    annotations: list = field(default_factory=list)   # (coco ann id, coco image id, (K,3) array, bbox)
    problems: list = field(default_factory=list)      # Problem
    notices: list = field(default_factory=list)       # str: things ignored on purpose


def _is_number(x) -> bool:
    if isinstance(x, bool) or not isinstance(x, (int, float)):
        return False
    try:
        return math.isfinite(x)
    except OverflowError:       # a JSON integer too large for a float
        return False


def _hashable(x) -> bool:
    """Ids from a file may be lists or objects; those can match no id."""
    try:
        hash(x)
    except TypeError:
        return False
    return True


def _safe_relative(file_name: str) -> str | None:
    """The file name as a relative POSIX path, or None if it is absolute or climbs out with '..'."""
    if not file_name or "\x00" in file_name:
        return None
    if PureWindowsPath(file_name).is_absolute() or PureWindowsPath(file_name).drive:
        return None
    p = PurePosixPath(file_name.replace("\\", "/"))
    if p.is_absolute() or any(part == ".." for part in p.parts):
        return None
    return p.as_posix()


def plan_import(data, skeleton: Skeleton, images_root: Path, *, source: str = "COCO file") -> ImportPlan:
    """Check a parsed COCO keypoints file against the project's skeleton and the image folder.

    Nothing is written: the caller applies the plan in one transaction, or
    refuses it, by policy.
    """
    plan = ImportPlan()
    P = plan.problems.append
    if not isinstance(data, dict):
        raise KinemarkError("a COCO file must be a JSON object with images, annotations and categories",
                            where=source)
    for key in ("images", "annotations", "categories"):
        if key not in data:
            raise KinemarkError(f"missing the '{key}' list", where=source)
        if not isinstance(data[key], list):
            raise KinemarkError(f"'{key}' must be a list", where=source)
    K = skeleton.num_keypoints

    # categories: keep person categories whose keypoint list fits the skeleton
    person_ids = set()
    for i, c in enumerate(data["categories"]):
        where = f"categories[{i}]"
        if not isinstance(c, dict) or isinstance(c.get("id"), bool) or not isinstance(c.get("id"), int):
            P(Problem(where, "a category needs an integer 'id'")); continue
        names = c.get("keypoints")
        if c.get("name") != "person" and not names:
            plan.notices.append(f"{where}: category {c.get('name')!r} has no keypoints; its annotations are ignored")
            continue
        if names is not None:
            if not isinstance(names, list) or len(names) != K:
                P(Problem(f"{where}.keypoints",
                          f"has {len(names) if isinstance(names, list) else 'no'} names; the project's "
                          f"skeleton {skeleton.name!r} has {K}"))
                continue
            if list(names) != list(skeleton.keypoints):
                diff = [f"{a}≠{b}" for a, b in zip(names, skeleton.keypoints) if a != b][:3]
                P(Problem(f"{where}.keypoints", "names or order differ from the project's skeleton ("
                          + ", ".join(diff) + ")"))
                continue
        person_ids.add(c["id"])
    if not person_ids:
        P(Problem("categories", "no person category with keypoints matching the project's skeleton"))

    # images
    root = Path(images_root).resolve()
    image_ids: dict = {}
    seen_ids = set()
    for i, im in enumerate(data["images"]):
        where = f"images[{i}]"
        if not isinstance(im, dict):
            P(Problem(where, "must be an object")); continue
        iid = im.get("id")
        if isinstance(iid, bool) or not isinstance(iid, int):
            P(Problem(f"{where}.id", f"{iid!r} is not an integer id")); continue
        where = f"image id {iid}"
        if iid in seen_ids:
            P(Problem(where, "duplicate image id")); image_ids.pop(iid, None); continue
        seen_ids.add(iid)
        fn = im.get("file_name")
        if not isinstance(fn, str):
            P(Problem(f"{where}.file_name", "missing or not a string")); continue
        rel = _safe_relative(fn)
        if rel is None:
            P(Problem(f"{where}.file_name", f"{fn!r} is absolute or leaves the image folder ('..'); refused"))
            continue
        path = (root / rel).resolve()
        try:
            path.relative_to(root)
        except ValueError:
            P(Problem(f"{where}.file_name", f"{fn!r} resolves outside the image folder; refused")); continue
        if not path.is_file():
            P(Problem(f"{where}.file_name", f"image not found on disk: {rel}")); continue
        w, h = im.get("width"), im.get("height")
        if w is not None and not (_is_number(w) and w > 0):
            P(Problem(f"{where}.width", f"{w!r} is not a positive number")); continue
        if h is not None and not (_is_number(h) and h > 0):
            P(Problem(f"{where}.height", f"{h!r} is not a positive number")); continue
        image_ids[iid] = (path, w, h)
    plan.images = [(iid, p, w, h) for iid, (p, w, h) in image_ids.items()]

    # annotations
    seen_ann = set()
    for i, a in enumerate(data["annotations"]):
        where = f"annotations[{i}]"
        if not isinstance(a, dict):
            P(Problem(where, "must be an object")); continue
        aid = a.get("id")
        if isinstance(aid, bool) or not isinstance(aid, int):
            P(Problem(f"{where}.id", f"{aid!r} is not an integer id")); continue
        where = f"annotation id {aid}"
        if aid in seen_ann:
            P(Problem(where, "duplicate annotation id")); continue
        seen_ann.add(aid)
        cid = a.get("category_id")
        if not _hashable(cid) or cid not in person_ids:
            plan.notices.append(f"{where}: category {cid!r} is not a person category with this skeleton; ignored")
            continue
        iid = a.get("image_id")
        if not _hashable(iid) or iid not in image_ids:
            if _hashable(iid) and iid in seen_ids:
                P(Problem(f"{where}.image_id", f"its image {iid!r} was refused (see that image's problem)"))
            else:
                P(Problem(f"{where}.image_id", f"points at unknown image {iid!r}"))
            continue
        if a.get("iscrowd") not in (None, 0, False):
            plan.notices.append(f"{where}: crowd region (iscrowd=1) has no keypoints to import; ignored")
            continue
        kp = a.get("keypoints")
        if not isinstance(kp, list) or len(kp) != 3 * K:
            P(Problem(f"{where}.keypoints",
                      f"has {len(kp) if isinstance(kp, list) else 'no'} values; expected {3 * K} "
                      f"({K} keypoints × x, y, v)"))
            continue
        if not all(_is_number(v) for v in kp):
            P(Problem(f"{where}.keypoints", "holds a value that is not a finite number")); continue
        arr = np.array(kp, float).reshape(K, 3)
        bad_v = [j for j in range(K) if arr[j, 2] not in (0, 1, 2)]
        if bad_v:
            P(Problem(f"{where}.keypoints", f"visibility of {skeleton.keypoints[bad_v[0]]!r} is "
                      f"{arr[bad_v[0], 2]:g}; COCO allows 0, 1 or 2")); continue
        _, w, h = image_ids[iid]
        bad_xy = [j for j in range(K) if arr[j, 2] > 0 and (arr[j, 0] < 0 or arr[j, 1] < 0
                  or (w and arr[j, 0] > w) or (h and arr[j, 1] > h))]
        if bad_xy:
            j = bad_xy[0]
            P(Problem(f"{where}.keypoints", f"{skeleton.keypoints[j]!r} at ({arr[j, 0]:g}, {arr[j, 1]:g}) "
                      f"is labelled (v={int(arr[j, 2])}) but lies outside the image")); continue
        arr[arr[:, 2] == 0, :2] = 0.0   # v=0 points carry no position, whatever the file says
        bbox = a.get("bbox")
        if bbox is not None:
            if not (isinstance(bbox, list) and len(bbox) == 4 and all(_is_number(b) for b in bbox)
                    and bbox[2] >= 0 and bbox[3] >= 0):
                P(Problem(f"{where}.bbox", f"{bbox!r} is not [x, y, width, height]")); continue
            bbox = tuple(float(b) for b in bbox)
        plan.annotations.append((aid, iid, arr, bbox))
    return plan


def load_json(path: Path):
    return read_json(path)
