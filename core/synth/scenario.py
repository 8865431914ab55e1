"""The invented Quillon Bay Stroke Rehabilitation Clinic demo set: participants, clips,
per-frame rendering with exact ground truth, and the files written to disk.

Invented data, for the demo and benchmarks only.

Ground truth per frame
----------------------
Keypoints are the 3-D joint centres of the skeleton (face points on the face
surface) projected with the clip's pinhole camera. Coordinates follow the
COCO keypoint convention of pixel indices: the centre of pixel column j is
x = j (the same convention as OpenCV's projectPoints; that COCO keypoints are
pixel indices while COCO boxes and polygons are continuous, with pixel j
spanning [j, j + 1), is common practice -- e.g. detectron2's COCO loader adds
0.5 to keypoints for that reason -- quoted from memory).

Visibility, decided at the keypoint's pixel p = floor(x + 0.5), floor(y + 0.5):

- v = 0 when p is outside the image (then x = y = 0, as COCO stores it);
- v = 2 when the surface drawn at p belongs to the participant and lies no
  nearer to the camera than the joint's *own* surface on that ray (the first
  hit of the solids that cover the joint, e.g. upper arm and forearm for the
  elbow; see ``body.OWN_PARTS``), less a 1.5 cm tolerance. In words: what
  the camera sees at the joint's pixel is the skin or clothing over that
  joint;
- v = 2 also when the pixel shows only the room: the point sits on the
  outline (face points such as the nose tip seen from the side) and the ray
  through the pixel centre just misses the body, with nothing in front;
- v = 1 otherwise: something nearer is drawn there -- another body part
  ("self", e.g. the far shoulder behind the trunk) or an object ("table",
  "chair", "walking_aid", "clinician", "target"). The reason is stored per
  keypoint in the non-standard annotation field ``occluded_by``.

The box is tight around the participant's visible pixels (the ID buffer
after all depth tests), in COCO's continuous convention [x0, y0, w, h] with
x0 = first column, w = last - first + 1 (what pycocotools' mask.toBbox gives
for the same mask); ``area`` is the visible silhouette's pixel count (what
pycocotools' mask.area gives), not the box area.
"""
from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

import cv2
import numpy as np

from ..errors import KinemarkError
from ..skeleton import COCO17
from . import body as bd
from . import raster as rs
from . import scene as sc
from .camera import Camera
from .motion import Participant, ReachPlan, SitToStandPlan

SCENARIO_NAME = "Quillon Bay Stroke Rehabilitation Clinic"
VIS_TOLERANCE_M = 0.015

SKIN_TONES = [(0.93, 0.78, 0.68), (0.86, 0.66, 0.53), (0.75, 0.54, 0.40),
              (0.61, 0.42, 0.30), (0.46, 0.31, 0.22), (0.33, 0.22, 0.16)]
SHIRTS = [(0.20, 0.32, 0.55), (0.62, 0.18, 0.20), (0.85, 0.82, 0.74), (0.26, 0.46, 0.32),
          (0.48, 0.38, 0.58), (0.80, 0.56, 0.22), (0.35, 0.55, 0.70), (0.30, 0.30, 0.32)]
TROUSERS = [(0.16, 0.18, 0.26), (0.30, 0.30, 0.32), (0.45, 0.38, 0.28), (0.12, 0.12, 0.13),
            (0.36, 0.40, 0.50)]
SHOES = [(0.10, 0.09, 0.09), (0.85, 0.85, 0.86), (0.35, 0.22, 0.14), (0.20, 0.25, 0.40)]
HAIR = [(0.07, 0.06, 0.06), (0.22, 0.14, 0.09), (0.42, 0.30, 0.18), (0.62, 0.60, 0.58),
        (0.80, 0.79, 0.76), (0.60, 0.45, 0.25)]

# code, base height (m), girth, affected side, walking aid, hair style, sleeves
_PEOPLE = [
    ("QB-01", 1.64, 1.00, None, None, "long", "long"),
    ("QB-02", 1.80, 1.22, None, None, "short", "short"),
    ("QB-03", 1.71, 0.95, "left", None, "short", "long"),
    ("QB-04", 1.86, 1.08, None, None, "bald", "short"),
    ("QB-05", 1.60, 1.30, None, "quad_stick", "short", "long"),
    ("QB-06", 1.75, 0.90, None, None, "long", "short"),
]

# (participant index, session, exercise, view, side, lighting, clinician, close camera)
_DEMO_CLIPS = [
    (0, 1, "reach", "front", "right", "bright", False, False),
    (0, 1, "sts", "side", "right", "normal", False, False),
    (0, 2, "reach", "oblique", "left", "normal", False, False),
    (0, 2, "sts", "front", "right", "dim", False, False),
    (1, 1, "reach", "side", "left", "normal", False, False),
    (1, 1, "sts", "oblique", "right", "bright", False, False),
    (1, 2, "reach", "front", "right", "dim", False, True),
    (1, 2, "sts", "side", "left", "normal", False, False),
    (2, 1, "reach", "front", "right", "normal", True, True),
    (2, 1, "sts", "oblique", "left", "normal", False, False),
    (2, 2, "reach", "oblique", "left", "bright", False, False),
    (2, 2, "sts", "front", "right", "normal", False, False),
    (3, 1, "reach", "oblique", "right", "dim", False, False),
    (3, 1, "sts", "side", "right", "lowlight_grey", False, False),
    (3, 2, "reach", "side", "right", "bright", False, False),
    (3, 2, "sts", "oblique", "left", "normal", False, False),
    (4, 1, "reach", "front", "left", "normal", True, True),
    (4, 1, "sts", "oblique", "right", "normal", False, False),
    (4, 2, "reach", "side", "right", "normal", False, False),
    (4, 2, "sts", "front", "left", "bright", False, False),
    (5, 1, "reach", "front", "right", "lowlight_grey", False, True),
    (5, 1, "sts", "side", "left", "normal", False, False),
    (5, 2, "reach", "oblique", "right", "normal", True, True),
    (5, 2, "sts", "oblique", "left", "dim", False, False),
]

_TINY_CLIPS = [
    (2, 1, "reach", "front", "right", "normal", True, True),
    (4, 1, "sts", "oblique", "right", "normal", False, False),
]

SIZES = {
    "demo": dict(clips=_DEMO_CLIPS, width=640, height=480, fps=15.0),
    "tiny": dict(clips=_TINY_CLIPS, width=320, height=240, fps=4.0),
}
_EXERCISE_CODE = {"reach": 1, "sts": 2}
_VIEW_CODE = {"front": 1, "oblique": 2, "side": 3}


def make_participant(seed: int, index: int, session: int = 1) -> Participant:
    code, h, girth, affected, aid, hair_style, sleeves = _PEOPLE[index]
    rng = np.random.default_rng([seed, 100, index])
    shape = bd.BodyShape(height=h + rng.uniform(-0.025, 0.025),
                         arm_scale=1.0 + rng.uniform(-0.04, 0.04),
                         leg_scale=1.0 + rng.uniform(-0.04, 0.04),
                         girth=girth + rng.uniform(-0.04, 0.04),
                         shoulder_scale=1.0 + rng.uniform(-0.05, 0.05),
                         head_scale=1.0 + rng.uniform(-0.04, 0.04))
    # every participant gets a different skin tone, so the set spans the whole palette;
    # clothes differ between participants and between the two sessions (different days)
    tone_order = np.random.default_rng([seed, 99]).permutation(len(SKIN_TONES))
    shirt_order = np.random.default_rng([seed, 98]).permutation(len(SHIRTS))
    shirt = SHIRTS[int(shirt_order[(index + 3 * (session - 1)) % len(SHIRTS)])]
    trousers = TROUSERS[int(rng.integers(len(TROUSERS)))]
    shoes = SHOES[int(rng.integers(len(SHOES)))]
    hair = HAIR[int(rng.integers(len(HAIR)))]
    if session == 2:
        trousers = TROUSERS[(TROUSERS.index(trousers) + 1 + int(rng.integers(len(TROUSERS) - 1)))
                            % len(TROUSERS)]
    app = bd.Appearance(
        skin=SKIN_TONES[int(tone_order[index])],
        shirt=shirt, trousers=trousers,
        shoes=shoes, hair=hair, hair_style=hair_style, sleeves=sleeves)
    return Participant(code=code, shape=shape, app=app, affected=affected, aid=aid,
                       aid_hand="right")


@dataclass(frozen=True)
class ClipInfo:
    name: str
    participant: str
    session: int
    exercise: str
    camera: str
    fps: float
    width: int
    height: int
    frame_count: int
    mp4_path: Path
    gt_path: Path


@dataclass
class Frame:
    """One rendered frame and its exact ground truth."""

    image: np.ndarray          # (H, W, 3) uint8 BGR
    keypoints: np.ndarray      # (17, 3) float64: x, y, v (COCO order)
    bbox: list                 # [x, y, w, h] (COCO, continuous pixel coordinates)
    area: int                  # visible silhouette pixel count
    person_mask: np.ndarray    # (H, W) bool, participant's visible pixels
    object_ids: np.ndarray     # (H, W) int16, raster.OBJ_* of the nearest surface
    occluded_by: list          # 17 strings: "" (visible / outside) or what is in front
    joints3d: np.ndarray       # (17, 3) world coordinates, metres
    uv: np.ndarray             # (17, 2) exact projections (also for v = 0 points)


@dataclass
class Clip:
    """One clip of the scenario; ``render(i)`` gives frame i without touching the disk."""

    name: str
    participant_index: int
    session: int
    exercise: str
    view: str
    side: str
    lighting: str
    clinician: bool
    close: bool
    width: int
    height: int
    fps: float
    seed: int
    person: Participant = field(init=False)
    plan: object = field(init=False)
    camera: Camera = field(init=False)
    frame_count: int = field(init=False)

    def __post_init__(self):
        self.person = make_participant(self.seed, self.participant_index, self.session)
        key = [self.seed, self.participant_index, self.session, _EXERCISE_CODE[self.exercise],
               _VIEW_CODE[self.view]]
        self._key = key
        rng = np.random.default_rng(key + [1])
        if self.exercise == "reach":
            # a clinician moving the second target needs a pause between the reaches
            self.plan = ReachPlan(self.person, self.session, rng, pause=2.0 if self.clinician else 0.0)
        else:
            self.plan = SitToStandPlan(self.person, self.session, rng)
        self.camera = sc.make_camera(self.view, self.side, self.exercise, self.width, self.height,
                                     np.random.default_rng(key + [2]), close=self.close)
        self.light = sc.LIGHTING[self.lighting]
        self.frame_count = int(round(self.plan.duration * self.fps))
        self._static = None
        self._pattern = None
        self._clin = None
        if self.clinician:
            if self.exercise != "reach":
                raise ValueError("the clinician's arm appears in reach clips only")
            self._clin = self._make_clinician(np.random.default_rng(key + [4]))

    # ------------------------------------------------------------------ scene set-up
    def _make_clinician(self, rng):
        skin = SKIN_TONES[int(rng.integers(len(SKIN_TONES)))]
        sleeve = (0.18, 0.45, 0.50)
        plan = self.plan
        # between the two reaches the clinician rests a hand on the participant's hand that
        # reaches next (repositioning it), coming in from the side of the frame
        r0, r1 = plan.reaches[0], plan.reaches[1]
        wrist = f"{r1['side']}_wrist"
        cam = self.camera

        def anchor(t, pose):
            w = pose.j[wrist]
            return w + bd.unit(cam.centre - w) * 0.055

        t_in, t_out = r0["t3"] - 0.1, r1["t0"] - 0.15
        pose0 = plan.pose(0.5 * (t_in + t_out))
        return sc.ClinicianArm(self.camera, anchor, t_in, t_out, pose0, skin, sleeve, rng)

    def _static_layer(self):
        if self._static is None:
            rng = np.random.default_rng(self._key + [3])
            room = sc.make_room(rng)
            table_edge = getattr(self.plan, "table_edge", None)
            room.shadows = sc.floor_shadows(self.exercise, table_edge, self.plan)
            colour, depth = sc.render_room(room, self.camera, self.light.light)
            prims = sc.furniture(self.exercise, table_edge, rng) + self.plan.static_prims()
            buf = rs.Buffers.empty(self.height, self.width)
            buf.depth[:] = depth
            rs.rasterise(prims, self.camera, buf)
            mask = buf.prim >= 0
            cols = np.array([p.colour for p in prims] or [(0, 0, 0)], float)
            shine = np.array([p.shine for p in prims] or [0.0], float)
            rs.shade(buf, cols, shine, self.camera, self.light.light, mask, colour)
            buf.prim[:] = -1
            self._static = (colour, buf)
        return self._static

    def time_of(self, i: int) -> float:
        return i / self.fps

    # ------------------------------------------------------------------ rendering
    def render(self, i: int, *, with_person: bool = True) -> Frame:
        """Frame ``i`` and its ground truth.

        ``with_person=False`` draws the same frame without the participant (room, furniture,
        walking aid and clinician exactly as with them, the same sensor noise): a reference
        for tests. Its keypoints then carry v = 1 with ``occluded_by`` "not_drawn".
        """
        if not 0 <= i < self.frame_count:
            raise IndexError(f"frame {i} outside 0..{self.frame_count - 1}")
        t = self.time_of(i)
        cam = self.camera
        colour0, buf0 = self._static_layer()
        pose = self.plan.pose(t)
        body = bd.body_prims(self.person.shape, self.person.app, pose)
        props = self.plan.prop_prims(t, pose)
        clin = self._clin.prims(t, pose) if self._clin is not None else []
        prims = (body if with_person else []) + props + clin
        buf = buf0.copy()
        cprims = rs.rasterise(prims, cam, buf)
        colour = colour0.copy()
        if prims:
            cols = np.array([p.colour for p in prims], float)
            shine = np.array([p.shine for p in prims], float)
            rs.shade(buf, cols, shine, cam, self.light.light, buf.prim >= 0, colour)
        image = self._postprocess(colour, i)

        joints = np.array([pose.j[k] for k in COCO17.keypoints])
        uv = cam.project(joints)
        z = cam.to_camera(joints)[:, 2]
        kps = np.zeros((17, 3))
        occluded = [""] * 17
        person_mask = buf.obj == rs.OBJ_PERSON
        ncp = len(body) if with_person else 0
        own_index = {}
        for idx, p in enumerate(cprims[:ncp]):
            own_index.setdefault(p.part, []).append(idx)
        for k, name in enumerate(COCO17.keypoints):
            col = int(np.floor(uv[k, 0] + 0.5))
            row = int(np.floor(uv[k, 1] + 0.5))
            if z[k] <= rs.NEAR or not (0 <= col < cam.width and 0 <= row < cam.height):
                continue          # v = 0, x = y = 0
            if not with_person:
                kps[k] = (uv[k, 0], uv[k, 1], 1)
                occluded[k] = "not_drawn"
                continue
            own = [cprims[j] for part in bd.OWN_PARTS[name] for j in own_index.get(part, [])]
            own_depth = min(rs.first_hit_depth(own, cam, row, col), float(z[k]))
            drawn_depth = float(buf.depth[row, col])
            drawn_obj = int(buf.obj[row, col])
            if drawn_obj == rs.OBJ_PERSON and drawn_depth >= own_depth - VIS_TOLERANCE_M:
                kps[k] = (uv[k, 0], uv[k, 1], 2)
            elif drawn_obj == rs.OBJ_NONE:
                # the pixel ray grazes past the rim (a face point on the outline): nothing
                # stands in front of the point, so it is visible
                kps[k] = (uv[k, 0], uv[k, 1], 2)
            else:
                kps[k] = (uv[k, 0], uv[k, 1], 1)
                occluded[k] = rs.OBJ_NAMES[drawn_obj]
        bbox, area = _mask_box(person_mask)
        return Frame(image=image, keypoints=kps, bbox=bbox, area=area, person_mask=person_mask,
                     object_ids=buf.obj.copy(), occluded_by=occluded, joints3d=joints, uv=uv)

    def _postprocess(self, colour: np.ndarray, i: int) -> np.ndarray:
        L = self.light
        H, W = self.height, self.width
        rng = np.random.default_rng(self._key + [5, i])
        img = colour * np.asarray(L.tint, np.float32)[None, None, :] * L.exposure
        yy, xx = np.mgrid[0:H, 0:W].astype(np.float32)
        r2 = ((xx - W / 2) / (W / 2)) ** 2 + ((yy - H / 2) / (H / 2)) ** 2
        img *= (1.0 - 0.16 * r2)[..., None]
        img = img * 255.0
        if self._pattern is None:
            prng = np.random.default_rng(self._key + [6])
            self._pattern = prng.normal(0.0, 1.0, (H, W, 3)).astype(np.float32)
        if L.grey:
            g = img[..., 0] * 0.299 + img[..., 1] * 0.587 + img[..., 2] * 0.114
            g = g + L.pattern * self._pattern[..., 0] + rng.normal(0.0, L.noise, g.shape).astype(np.float32)
            img = np.repeat((g * L.gain)[..., None], 3, axis=2)
        else:
            img = (img + L.pattern * self._pattern +
                   rng.normal(0.0, L.noise, img.shape).astype(np.float32)) * L.gain
        rgb = np.clip(np.rint(img), 0, 255).astype(np.uint8)
        return np.ascontiguousarray(rgb[..., ::-1])       # BGR for OpenCV

    @property
    def info_dict(self) -> dict:
        return {"name": self.name, "participant": self.person.code, "session": self.session,
                "exercise": self.exercise, "camera": self.view, "camera_side": self.side,
                "lighting": self.lighting, "clinician_in_view": self.clinician,
                "fps": self.fps, "width": self.width, "height": self.height,
                "frame_count": self.frame_count, "seed": self.seed,
                "camera_params": self.camera.to_dict(), "motion": self.plan.describe()}


def _mask_box(mask: np.ndarray):
    rows = np.flatnonzero(mask.any(axis=1))
    cols = np.flatnonzero(mask.any(axis=0))
    if rows.size == 0:
        return [0.0, 0.0, 0.0, 0.0], 0
    x0, x1, y0, y1 = int(cols[0]), int(cols[-1]), int(rows[0]), int(rows[-1])
    return [float(x0), float(y0), float(x1 - x0 + 1), float(y1 - y0 + 1)], int(mask.sum())


def check_seed(seed) -> None:
    """Refuse a scenario seed that is not a non-negative integer."""
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise KinemarkError(f"the seed must be a non-negative integer, not {seed!r}")


def scenario_clips(seed: int = 7, size: str = "demo") -> list[Clip]:
    """The clips of the demo ("demo") or test-size ("tiny") set, not yet rendered."""
    if size not in SIZES:
        raise KinemarkError(f"unknown scenario size {size!r}; choose one of {', '.join(SIZES)}")
    check_seed(seed)
    spec = SIZES[size]
    out = []
    for (p, s, ex, view, side, light, clin, close) in spec["clips"]:
        code = _PEOPLE[p][0]
        out.append(Clip(name=f"{code}_s{s}_{ex}_{view}", participant_index=p, session=s, exercise=ex,
                        view=view, side=side, lighting=light, clinician=clin, close=close,
                        width=spec["width"], height=spec["height"], fps=spec["fps"], seed=int(seed)))
    return out


def render_frame(clip: Clip, frame_index: int):
    """(BGR uint8 image, (17, 3) keypoints, [x, y, w, h] box) of one frame."""
    f = clip.render(frame_index)
    return f.image, f.keypoints, f.bbox


def _r(x, nd=4):
    return float(round(float(x), nd))


def coco_document(clip: Clip, frames: list[Frame]) -> dict:
    images, anns = [], []
    for i, f in enumerate(frames):
        images.append({"id": i + 1, "file_name": f"{clip.name}.mp4", "frame_index": i,
                       "width": clip.width, "height": clip.height})
        kp = []
        for x, y, v in f.keypoints:
            kp += [_r(x), _r(y), int(v)] if v > 0 else [0, 0, 0]
        anns.append({"id": i + 1, "image_id": i + 1, "category_id": 1, "keypoints": kp,
                     "num_keypoints": int((f.keypoints[:, 2] > 0).sum()),
                     "bbox": [_r(b, 2) for b in f.bbox], "area": int(f.area), "iscrowd": 0,
                     "occluded_by": list(f.occluded_by)})
    cat = {"id": 1, "name": "person", "supercategory": "person",
           "keypoints": list(COCO17.keypoints),
           "skeleton": [[a + 1, b + 1] for a, b in COCO17.edges]}
    info = {"description": f"{SCENARIO_NAME} (invented): synthetic clip {clip.name}, "
                           "rendered by kinemark.core.synth; demo and benchmark data only",
            "version": "1", "clip": clip.name, "seed": clip.seed,
            "visibility_rule": "v=2 if the participant's own surface over the joint is what is drawn "
                               "at its pixel (1.5 cm tolerance), v=1 if anything nearer is drawn there, "
                               "v=0 outside the image",
            "area": "visible silhouette pixel count"}
    return {"info": info, "licenses": [], "images": images, "annotations": anns, "categories": [cat]}


def _dump(obj) -> bytes:
    return (json.dumps(obj, indent=None, separators=(",", ":"), sort_keys=False) + "\n").encode("utf-8")


def render_scenario(out_dir, *, seed: int = 7, size: str = "demo", progress=None) -> list[ClipInfo]:
    """Render the scenario's clips to ``out_dir``: <clip>.mp4, <clip>.coco.json, scenario.json."""
    clips = scenario_clips(seed, size)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    total = sum(c.frame_count for c in clips)
    done = 0
    infos = []
    people = {}
    for clip in clips:
        mp4 = out / f"{clip.name}.mp4"
        gt = out / f"{clip.name}.coco.json"
        writer = cv2.VideoWriter(str(mp4), cv2.VideoWriter_fourcc(*"mp4v"), float(clip.fps),
                                 (clip.width, clip.height), True)
        if not writer.isOpened():
            raise KinemarkError("OpenCV cannot open an MP4 writer (codec 'mp4v'); "
                                "check that opencv-python-headless is installed with video support",
                                where=str(mp4))
        frames = []
        try:
            for i in range(clip.frame_count):
                f = clip.render(i)
                writer.write(f.image)
                f.image = None            # keep memory flat: the JSON needs only the ground truth
                f.person_mask = None
                f.object_ids = None
                frames.append(f)
                done += 1
                if progress is not None:
                    progress(done, total, f"{clip.name} frame {i + 1}/{clip.frame_count}")
        finally:
            writer.release()
        gt.write_bytes(_dump(coco_document(clip, frames)))
        infos.append(ClipInfo(name=clip.name, participant=clip.person.code, session=clip.session,
                              exercise=clip.exercise, camera=clip.view, fps=clip.fps,
                              width=clip.width, height=clip.height, frame_count=clip.frame_count,
                              mp4_path=mp4, gt_path=gt))
        p = clip.person
        people[p.code] = {"code": p.code, "affected_side": p.affected, "walking_aid": p.aid,
                          "walking_aid_hand": p.aid_hand if p.aid else None,
                          "body": p.shape.to_dict(),
                          "appearance": {"hair_style": p.app.hair_style, "sleeves": p.app.sleeves}}
    doc = {"scenario": SCENARIO_NAME, "note": "invented participants and data; demo and benchmarks only",
           "seed": int(seed), "size": size,
           "participants": [people[k] for k in sorted(people)],
           "clips": [dict(c.info_dict, mp4=f"{c.name}.mp4", coco=f"{c.name}.coco.json") for c in clips]}
    (out / "scenario.json").write_bytes(_dump(doc))
    return infos
