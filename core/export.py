"""The export bundle: accepted labels split by participant, with images, tables and a manifest.

Layout of a bundle folder (every file 0600, every folder 0700)::

    manifest.json                 sha256 of every other file, counts, skeleton, tool version,
                                  model ids, export settings (and the de-identification summary)
    README.txt                    what this is, the clinical caution
    train/coco_train.json         one COCO keypoints file per split ...
    train/<frame>.png             ... with its frames next to it (file_name = the PNG's name)
    val/..., test/...
    tables/keypoints.csv          long form: one row per (annotation, keypoint)
    tables/keypoints.parquet      the same, when pyarrow is installed

The split is by participant: every participant's frames go to exactly one split, so
no person is seen in training and in evaluation. The COCO files are written by
core/coco.py (``build_coco``), as ``kinemark export`` writes them.

``deidentify``: faces are blurred from the face keypoints (nose, eyes, ears) with a
margin scaled to head size, or from the top of the person's box when no face point is
labelled; frames get random pseudonymous names; participant codes and staff names
are replaced by pseudonyms; no original file name, folder, frame time or capture date is
written; pixels are re-encoded as PNG without metadata. The mapping back to the
project is kept only in the project's own event log. Automatic de-identification is a
help, not a guarantee: a person must check the bundle.

Every export (the bundle, ``kinemark export``'s COCO file and frames, the agreement
report) checks where it writes before any work (:class:`Targets`: never onto the
project's database or its media, an existing file only when asked to) and writes all
or nothing (:class:`Staged`: temporary names beside the targets, moved into place at
the end), so a failed export leaves neither a partial folder nor a half-written file.
"""
from __future__ import annotations

import contextlib
import hashlib
import importlib.util
import io
import json
import os
import secrets
import shutil
import tempfile
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

import cv2
import numpy as np
import pandas as pd

from . import coco
from .errors import KinemarkError
from .metrics import bbox_from_keypoints
from .model import ACCEPTED, STATES, Changes

SPLITS = ("train", "val", "test")
DEFAULT_RATIOS = (0.7, 0.15, 0.15)
FACE_KEYPOINTS = ("nose", "left_eye", "right_eye", "left_ear", "right_ear")
DEFAULT_MARGIN = 0.5

DEID_CAUTION = ("Automatic de-identification is a help, not a guarantee: a person must check every image "
                "and file of this bundle before it leaves the study team.")
README = """Kinemark export bundle

Keypoint labels in the COCO keypoint format, split by participant (no participant
appears in two splits). manifest.json lists every file with its sha256, the counts,
the skeleton, the tool and model versions and the export settings.

Labels and model output made with Kinemark are research data, not a diagnosis, and are
not fit for clinical decisions about a patient. The study's protocol, its ethics
approval and local privacy law come first.
"""


# ---- the participant-level split -------------------------------------------------------------

def allocate(n: int, ratios) -> list[int]:
    """How many of ``n`` participants go to each split: largest-remainder rounding of
    n x ratio, giving every split with a non-zero ratio at least one participant when
    there are enough participants."""
    r = np.asarray(ratios, float)
    exact = r * n
    counts = np.floor(exact).astype(int)
    for i in np.argsort(-(exact - counts), kind="stable")[: n - counts.sum()]:
        counts[i] += 1
    nonzero = np.flatnonzero(r > 0)
    if n >= len(nonzero):
        for i in nonzero:
            if counts[i] == 0:
                donor = int(np.argmax(counts))
                counts[donor] -= 1
                counts[i] += 1
    return [int(c) for c in counts]


def split_participants(keys, ratios=DEFAULT_RATIOS, seed: int = 0) -> dict:
    """Assign each participant key to one split, deterministically from ``seed``.

    The sorted keys are permuted with numpy ``default_rng(seed)`` and cut into
    consecutive runs of the sizes :func:`allocate` gives.
    """
    keys = sorted(set(keys), key=str)
    perm = np.random.default_rng(int(seed)).permutation(len(keys))
    counts = allocate(len(keys), ratios)
    out, pos = {}, 0
    for split, c in zip(SPLITS, counts):
        for i in perm[pos:pos + c]:
            out[keys[i]] = split
        pos += c
    return out


def check_ratios(ratios) -> tuple[float, float, float]:
    r = tuple(float(x) for x in ratios)
    if len(r) != 3 or any(not np.isfinite(x) or x < 0 for x in r):
        raise KinemarkError("split ratios are three non-negative numbers: train, validation, test")
    if abs(sum(r) - 1.0) > 1e-6:
        raise KinemarkError(f"split ratios must add up to 1 (they add up to {sum(r):g})")
    if r[0] == 0:
        raise KinemarkError("the training split cannot be empty")
    return r


# ---- face blurring (plain functions over arrays) -----------------------------------------------

@dataclass(frozen=True)
class BlurRegion:
    kind: str        # "circle" (cx, cy, r) | "rect" (x0, y0, x1, y1)
    values: tuple
    basis: str       # "face" | "box"


def face_region(kps, names, *, margin: float = DEFAULT_MARGIN, bbox=None, image_size=None,
                extra_face=None) -> BlurRegion | None:
    """Where one person's face is, from their keypoints.

    Face points (nose, eyes, ears with v > 0; else ``extra_face``, e.g. the model's
    points) give a circle around their centre whose radius is the farthest face point
    plus ``margin`` x head size. Head size is the largest distance between face points,
    at least half the shoulder width when both shoulders are labelled (a body
    proportion assumed here, not measured), and at least 8 pixels. With no face point,
    the top of the person's box (``bbox`` or the box around the points) is covered,
    from well above it (the head rises above a box drawn around the body's points) to
    a third of the head size into it. Returns None when the person has no point at all.
    """
    k = np.asarray(kps, float).reshape(-1, 3)
    names = list(names)
    idx = [names.index(n) for n in FACE_KEYPOINTS if n in names]
    pts = k[idx][k[idx, 2] > 0, :2] if idx else np.zeros((0, 2))
    if len(pts) == 0 and extra_face is not None:
        e = np.asarray(extra_face, float).reshape(-1, 3)
        pts = e[idx][e[idx, 2] > 0, :2] if idx else pts
    shoulder_w = None
    if "left_shoulder" in names and "right_shoulder" in names:
        a, b = k[names.index("left_shoulder")], k[names.index("right_shoulder")]
        if a[2] > 0 and b[2] > 0:
            shoulder_w = float(np.hypot(*(a[:2] - b[:2])))
    if len(pts):
        c = pts.mean(axis=0)
        span = max((float(np.hypot(*(p - q))) for p in pts for q in pts), default=0.0)
        head = max(span, 0.5 * shoulder_w if shoulder_w else 0.0, 8.0)
        r = float(np.max(np.hypot(*(pts - c).T))) if len(pts) > 1 else 0.0
        r = max(r, 0.5 * head) + margin * head
        return BlurRegion("circle", (float(c[0]), float(c[1]), r), "face")
    box = bbox or bbox_from_keypoints(k, image_size=image_size)
    if box is None:
        return None
    bx, by, bw, bh = box
    head = max(0.6 * shoulder_w if shoulder_w else 0.2 * bh, 8.0)
    return BlurRegion("rect", (bx - 0.1 * bw - margin * head, by - (1.5 + margin) * head,
                               bx + 1.1 * bw + margin * head, by + head / 3), "box")


def blur_regions(img: np.ndarray, regions) -> np.ndarray:
    """A copy of ``img`` with each region pixelated and blurred (OpenCV resize + GaussianBlur).

    Pixelation to blocks of a sixth of the region's size, then a Gaussian blur, removes
    facial detail; coarse colour survives. Common practice, not a proven anonymiser.
    """
    out = img.copy()
    H, W = img.shape[:2]
    for reg in regions:
        if reg.kind == "circle":
            cx, cy, r = reg.values
            x0, y0, x1, y1 = cx - r, cy - r, cx + r, cy + r
        else:
            x0, y0, x1, y1 = reg.values
        X0, Y0 = max(0, int(np.floor(x0))), max(0, int(np.floor(y0)))
        X1, Y1 = min(W, int(np.ceil(x1)) + 1), min(H, int(np.ceil(y1)) + 1)
        if X1 <= X0 or Y1 <= Y0:
            continue
        roi = out[Y0:Y1, X0:X1]
        h, w = roi.shape[:2]
        block = max(3, int(max(h, w) / 6))
        small = cv2.resize(roi, (max(1, w // block), max(1, h // block)), interpolation=cv2.INTER_AREA)
        pix = cv2.resize(small, (w, h), interpolation=cv2.INTER_NEAREST)
        ks = 2 * (block // 2) + 1
        pix = cv2.GaussianBlur(pix, (ks, ks), 0)
        if reg.kind == "circle":
            mask = np.zeros((h, w), np.uint8)
            cv2.circle(mask, (int(round(cx - X0)), int(round(cy - Y0))), int(np.ceil(r)), 255, -1)
            sel = mask > 0
            roi[sel] = pix[sel]
        else:
            roi[:] = pix
    return out


# ---- writing privately, inside the bundle only ----------------------------------------------------

class _Bundle:
    def __init__(self, root: Path):
        self.root = root.resolve()
        self.files: dict[str, tuple[str, int]] = {}

    def path(self, rel: str) -> Path:
        p = (self.root / rel).resolve()
        try:
            p.relative_to(self.root)
        except ValueError:
            raise KinemarkError(f"refused to write {rel!r}: it would leave the export folder") from None
        if p == self.root:
            raise KinemarkError(f"refused to write {rel!r}")
        return p

    def mkdir(self, rel: str):
        p = self.path(rel)
        p.mkdir(mode=0o700, parents=False, exist_ok=True)
        os.chmod(p, 0o700)

    def write(self, rel: str, data: bytes, *, listed: bool = True):
        p = self.path(rel)
        if not p.parent.is_dir():
            self.mkdir(str(p.parent.relative_to(self.root)))
        flags = os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_NOFOLLOW", 0)
        fd = os.open(str(p), flags, 0o600)
        with os.fdopen(fd, "wb") as f:
            f.write(data)
        os.chmod(p, 0o600)
        if listed:
            self.files[p.relative_to(self.root).as_posix()] = (hashlib.sha256(data).hexdigest(), len(data))


# ---- where an export may write, and writing all or nothing ---------------------------------------

DB_JOURNALS = ("-wal", "-shm", "-journal")


class Targets:
    """The checks every export runs on the paths it was given, before any work.

    Refused, whatever the options: the project's database and its journal files, its
    team settings, and every media file the project references (the export is made from
    them; writing onto one destroys the project or a source video); a folder given where
    a file is meant and the reverse; two outputs of one export on the same path; a path
    whose folder is missing together with the folder above it (one missing folder is
    created, as the exports have always done for a new output folder; a deeper missing
    path is usually a typo). An existing file is replaced only with ``overwrite``.
    Paths are compared after resolving links, and by device and inode for files that
    exist, so a link or a second name for the database is caught as well.
    """

    def __init__(self, project=None):
        self.protected: dict[Path, str] = {}
        self.inodes: dict[tuple[int, int], str] = {}
        self.claimed: set[Path] = set()
        if project is None:
            return
        from .project import TEAM_FILE
        from .store import DB_NAME
        db = project.root / DB_NAME
        self._protect(db, "the project's database (writing onto it would destroy the project)")
        for suffix in DB_JOURNALS:
            self._protect(db.with_name(db.name + suffix), "a journal file of the project's database")
        self._protect(project.root / TEAM_FILE, "the project's team settings")
        for m in project.store.all_media():
            try:
                path = project.media_path(m)
            except KinemarkError:
                continue
            self._protect(path, f"media {m.id} of the project, a source {m.kind}")

    def _protect(self, path: Path, why: str):
        self.protected[Path(os.path.realpath(path))] = why
        try:
            st = os.stat(path)
        except OSError:
            return
        self.inodes[(st.st_dev, st.st_ino)] = why

    def _refuse_protected(self, path: Path):
        why = self.protected.get(Path(os.path.realpath(path)))
        if why is None:
            try:
                st = os.stat(path)
            except OSError:
                st = None
            if st is not None:
                why = self.inodes.get((st.st_dev, st.st_ino))
        if why is not None:
            raise KinemarkError(f"refused to write here: this is {why}", where=str(path))

    def _claim(self, path: Path):
        real = Path(os.path.realpath(path))
        if real in self.claimed:
            raise KinemarkError("two outputs of this export would be the same path", where=str(path))
        self.claimed.add(real)

    @staticmethod
    def _check_parent(path: Path):
        parent = path.parent
        if parent.is_dir():
            return
        if parent.exists() or parent.is_symlink():
            raise KinemarkError("cannot write here: the folder to write into is not a folder", where=str(parent))
        if not parent.parent.is_dir():
            raise KinemarkError("the folder to write into does not exist, nor does the folder above it; "
                                "create it first", where=str(parent))

    def file(self, path, *, overwrite: bool) -> Path:
        """Check an output file (the COCO file, the report page, its CSV)."""
        path = Path(path)
        self._refuse_protected(path)
        if path.is_dir():
            raise KinemarkError("this is a folder; give the name of a file to write", where=str(path))
        if path.exists() or path.is_symlink():
            if not overwrite:
                raise KinemarkError("the file exists; choose a new name, or add --overwrite to replace it",
                                    where=str(path))
            if path.exists() and not path.is_file():
                raise KinemarkError("cannot write here: this is not a regular file", where=str(path))
        self._check_parent(path)
        self._claim(path)
        return path

    def folder(self, path, *, what: str) -> Path:
        """Check an output folder (``what`` names the option, for the message)."""
        path = Path(path)
        self._refuse_protected(path)
        if (path.exists() or path.is_symlink()) and not path.is_dir():
            raise KinemarkError(f"{what} names a folder, and this is a file", where=str(path))
        self._check_parent(path)
        self._claim(path)
        return path

    def files_in(self, folder: Path, names, *, overwrite: bool):
        """Check the files an export will put into ``folder``: never through a link (a link
        planted under a frame's name could lead the export to a file outside the folder),
        never onto a folder or a protected file, and onto an existing file only with ``overwrite``."""
        existing = []
        for name in names:
            p = folder / name
            if p.is_symlink():
                raise KinemarkError("refused to write through a symbolic link", where=str(p))
            self._refuse_protected(p)
            self._claim(p)
            if p.exists():
                if not p.is_file():
                    raise KinemarkError("cannot write a frame here: this is not a regular file", where=str(p))
                existing.append(p)
        if existing and not overwrite:
            raise KinemarkError(f"{len(existing)} of the files to write exist already (the first: "
                                f"{existing[0].name}); choose a new or empty folder, or add --overwrite",
                                where=str(folder))


class Staged:
    """Output files and folders, written under temporary names beside their targets and
    moved into place only by :meth:`commit`, at the very end of an export.

    Leaving the ``with`` block by an exception (a frame that fails its checksum, a full
    disk, Ctrl-C) removes every temporary file and folder and any folder it created, so
    a failed export leaves the disk as it was, and a retry starts from a clean state. A
    new folder is built as a hidden sibling and renamed into place in one step; files
    for an existing folder are built in a hidden folder inside it and moved in one by one.
    """

    def __init__(self):
        self._files: list[tuple[Path, Path]] = []      # (temporary, target)
        self._folders: list[tuple[Path, Path]] = []    # (staging folder, target)
        self._made: list[Path] = []                    # folders created for a target
        self._done = False

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        if exc_type is not None or not self._done:
            self.discard()

    def _parent(self, path: Path) -> Path:
        parent = path.parent
        if not parent.is_dir():
            try:
                parent.mkdir(mode=0o700)
            except OSError as e:
                raise KinemarkError(f"cannot create the folder: {e.strerror}", where=str(parent)) from None
            self._made.append(parent)
        return parent

    def file(self, path: Path, data: str | bytes):
        """Write ``data`` (readable by the user only) to a temporary file beside ``path``, flushed to disk."""
        path = Path(path)
        parent = self._parent(path)
        try:
            fd, tmp = tempfile.mkstemp(dir=parent, prefix=f".{path.name}.", suffix=".partial")
        except OSError as e:
            raise KinemarkError(f"cannot write: {e.strerror}", where=str(path)) from None
        self._files.append((Path(tmp), path))
        text = not isinstance(data, bytes)
        try:
            with os.fdopen(fd, "w" if text else "wb", encoding="utf-8" if text else None) as f:
                os.fchmod(f.fileno(), 0o600)
                f.write(data)
                f.flush()
                os.fsync(f.fileno())
        except OSError as e:
            raise KinemarkError(f"cannot write: {e.strerror}", where=str(path)) from None

    @staticmethod
    def put(stage: Path, name: str, data: bytes):
        """Write a file (readable by the user only) under its final ``name`` into a staging
        folder from :meth:`folder`: the folder as a whole is what is moved into place."""
        p = stage / name
        flags = os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_NOFOLLOW", 0)
        try:
            with os.fdopen(os.open(str(p), flags, 0o600), "wb") as f:
                os.fchmod(f.fileno(), 0o600)
                f.write(data)
        except OSError as e:
            raise KinemarkError(f"cannot write: {e.strerror}", where=str(p)) from None

    def folder(self, path: Path) -> Path:
        """A private staging folder whose contents :meth:`commit` moves into ``path``."""
        path = Path(path)
        base = path if path.is_dir() else self._parent(path)
        prefix = ".kinemark-partial-" if path.is_dir() else f".{path.name}.partial-"
        try:
            stage = Path(tempfile.mkdtemp(dir=base, prefix=prefix))
            os.chmod(stage, 0o700)
        except OSError as e:
            raise KinemarkError(f"cannot write: {e.strerror}", where=str(path)) from None
        self._folders.append((stage, path))
        return stage

    def commit(self):
        """Move everything into place: folders first, then files (a COCO file names its frames)."""
        try:
            for stage, target in self._folders:
                if not target.exists():
                    os.rename(stage, target)
                    continue
                for entry in sorted(stage.iterdir(), key=lambda q: (q.name == "manifest.json", q.name)):
                    os.replace(entry, target / entry.name)
                stage.rmdir()
            for tmp, target in self._files:
                os.replace(tmp, target)
        except OSError as e:
            raise KinemarkError(f"cannot move the export into place: {e.strerror}",
                                where=str(e.filename or "")) from None
        self._done = True

    def discard(self):
        for tmp, _ in self._files:
            with contextlib.suppress(OSError):
                os.unlink(tmp)
        for stage, _ in self._folders:
            shutil.rmtree(stage, ignore_errors=True)
        for folder in reversed(self._made):
            with contextlib.suppress(OSError):
                folder.rmdir()      # only if still empty
        self._files, self._folders, self._made = [], [], []


def _check_bundle_folder(targets: Targets, out: Path) -> Path:
    out = targets.folder(Path(out), what="the export bundle")
    if out.exists():
        if any(out.iterdir()):
            raise KinemarkError("the export folder is not empty; choose a new or empty folder", where=str(out))
    elif out.suffix.lower() == ".json":
        raise KinemarkError("a bundle is a folder, not a .json file (drop --split/--seed/--deidentify/"
                            "--bundle to write a single COCO file)", where=str(out))
    return out


def nothing_to_export(project, states) -> str:
    """Why an export of ``states`` is empty, with what the project does hold."""
    counts = dict(project.store.state_counts())
    blank = counts.pop("blank", 0)
    held = [f"{n} {s}" for s, n in counts.items() if n]
    if blank:
        held.append(f"{blank} frame(s) with no annotation")
    return f"no annotation is {' or '.join(states)} (the project has {', '.join(held) or 'no frames'})"


def _png(img: np.ndarray) -> bytes:
    ok, buf = cv2.imencode(".png", img)
    if not ok:
        raise KinemarkError("cannot encode a frame as PNG")
    return buf.tobytes()


def parquet_available() -> bool:
    return importlib.util.find_spec("pyarrow") is not None


# ---- the export ---------------------------------------------------------------------------

def export_bundle(project, out, *, states=(ACCEPTED,), ratios=DEFAULT_RATIOS, seed: int = 0,
                  deidentify: bool = False, margin: float = DEFAULT_MARGIN, user=None,
                  progress=None) -> Changes:
    """Write an export bundle (see the module docstring) into the new or empty folder ``out``.

    All or nothing: the target is checked before any work (:class:`Targets`), the bundle is
    built in a hidden staging folder and moved into ``out`` at the end; a failure (a frame
    that fails its checksum, say) leaves ``out`` as it was."""
    states = list(states)
    bad = [s for s in states if s not in STATES]
    if bad or not states:
        raise KinemarkError(f"unknown state(s) {', '.join(bad) or '(none)'}; states are {', '.join(STATES)}")
    ratios = check_ratios(ratios)
    if not margin >= 0:
        raise KinemarkError("the blur margin must be zero or more")
    store, skel = project.store, project.skeleton
    who = project.user(user) if not hasattr(user, "role") else user
    out = _check_bundle_folder(Targets(project), Path(out))
    rows = store.export_rows(states)
    if not rows:
        raise KinemarkError(f"nothing to export: {nothing_to_export(project, states)}")
    with Staged() as staged:
        # built in a hidden staging folder, moved into ``out`` only when complete
        changes = _write_bundle(project, out, staged.folder(out), staged, rows, states=states, ratios=ratios,
                                seed=seed, deidentify=deidentify, margin=margin, who=who, progress=progress)
    return changes


def _write_bundle(project, out, stage, staged, rows, *, states, ratios, seed, deidentify, margin, who,
                  progress) -> Changes:
    """The work of :func:`export_bundle`: every file goes into the staging folder ``stage``;
    ``staged.commit()`` moves it into ``out`` once the manifest is written."""
    from .review import authorships, reviewer_of
    store, skel = project.store, project.skeleton
    b = _Bundle(stage)
    names = list(skel.keypoints)

    media = {m.id: m for m in store.all_media()}
    anns = {a.id: a for a in store.annotations(states)}
    auth = authorships(project, list(anns))
    evs: dict = {}
    for ev in store.events_for("annotation", list(anns), actions=["state"]):
        evs.setdefault(ev.entity_id, []).append(ev)
    users = {u.id: u.name for u in store.users()}
    all_props = store.proposals()
    props_by_frame: dict = {}
    for p in all_props:   # ordered by frame, person, id: the latest proposal wins
        props_by_frame.setdefault(p.frame_id, {})[p.person] = p

    # participants and the split
    def key_of(r):
        return r[10] if r[10] else f"(no participant: media {r[6]})"
    keys = sorted({key_of(r) for r in rows}, key=str)
    unassigned = [k for k in keys if k.startswith("(no participant")]
    split_of = split_participants(keys, ratios, seed)

    # names: plain, or pseudonyms (random; the mapping goes to the project's event log only)
    rng = secrets.SystemRandom()
    if deidentify:
        order = keys[:]
        rng.shuffle(order)
        part_name = {k: f"P{n + 1:03d}" for n, k in enumerate(order)}
        staff = sorted(users)
        rng.shuffle(staff)
        staff_name = {u: f"staff-{n + 1:02d}" for n, u in enumerate(staff)}
    else:
        part_name = {k: k for k in keys}
        staff_name = dict(users)
    frame_ids = sorted({r[1] for r in rows})
    if deidentify:
        frame_name = {}
        for fid in frame_ids:
            name = secrets.token_hex(8) + ".png"
            while name in frame_name.values():
                name = secrets.token_hex(8) + ".png"
            frame_name[fid] = name
    else:
        frame_name = {r[1]: coco.frame_file_name(r[6], r[7]) for r in rows}

    today = datetime.now(timezone.utc).strftime("%Y-%m-%d")
    counts = {}
    table_rows = []
    deid = {"faces_blurred_from_face_points": 0, "heads_blurred_from_person_box": 0,
            "people_not_located": 0}
    n_done, total = 0, len(frame_ids)
    for split, ratio in zip(SPLITS, ratios):
        if ratio == 0:
            continue
        srows = [r for r in rows if split_of[key_of(r)] == split]
        b.mkdir(split)
        data = coco.build_coco(srows, skel, description=f"Kinemark export, {split} split", date_created=today)
        if deidentify:
            # renumber images and annotations in pseudonym order: ids carry no frame order
            img_order = sorted(data["images"], key=lambda im: frame_name[im["id"]])
            new_img = {im["id"]: n + 1 for n, im in enumerate(img_order)}
            for im in data["images"]:
                im["file_name"] = frame_name[im["id"]]
                im["id"] = new_img[im["id"]]
            data["images"].sort(key=lambda im: im["id"])
            for n, an in enumerate(sorted(data["annotations"], key=lambda a: (new_img[a["image_id"]], a["id"]))):
                an["image_id"] = new_img[an["image_id"]]
                an["id"] = n + 1
            data["annotations"].sort(key=lambda a: a["id"])
            image_id_of = lambda fid: new_img[fid]  # noqa: E731
        else:
            image_id_of = lambda fid: fid  # noqa: E731
        b.write(f"{split}/coco_{split}.json", json.dumps(data, indent=1).encode("utf-8"))
        seen = set()
        for r in srows:
            fid, mid, fidx = r[1], r[6], r[7]
            if fid in seen:
                continue
            seen.add(fid)
            img = project.read_frame(mid, fidx)
            if deidentify:
                img = _deidentify_frame(project, fid, img, names, margin, deid, props_by_frame)
            b.write(f"{split}/{frame_name[fid]}", _png(img))
            n_done += 1
            if progress is not None:
                progress(n_done, total, f"writing {split} frames")
        for r in srows:
            a = anns[r[0]]
            au = auth[a.id]
            rev = reviewer_of(evs.get(a.id, []))
            base = {"split": split, "image_id": image_id_of(r[1]), "frame": frame_name[r[1]],
                    "participant": part_name[key_of(r)], "person": int(a.person)}
            if not deidentify:
                base.update({"media_id": int(r[6]), "media": media[r[6]].display_name,
                             "frame_index": int(r[7]),
                             "timestamp": float(r[12]) if r[12] is not None else np.nan})
            for j, name in enumerate(names):
                x, y, v = a.keypoints[j]
                table_rows.append({**base, "keypoint": name, "x": float(x), "y": float(y),
                                   "visibility": int(v), "source": a.sources[j],
                                   "annotator": staff_name.get(au.author_id, "") if au.author_id else "",
                                   "reviewer": staff_name.get(rev, "") if rev else "", "state": a.state})
        counts[split] = {"participants": len({key_of(r) for r in srows}), "images": len(data["images"]),
                         "annotations": len(data["annotations"])}

    # tables
    df = pd.DataFrame(table_rows)
    b.write("tables/keypoints.csv", df.to_csv(index=False).encode("utf-8"))
    tables = ["tables/keypoints.csv"]
    if parquet_available():
        buf = io.BytesIO()
        df.to_parquet(buf, index=False)
        b.write("tables/keypoints.parquet", buf.getvalue())
        tables.append("tables/keypoints.parquet")
    b.write("README.txt", (README + ("\n" + DEID_CAUTION + "\n" if deidentify else "")).encode("utf-8"))

    # models that proposed points on the exported frames
    fset = set(frame_ids)
    models = sorted({(p.model_id, p.model_hash, bool(p.adapted)) for p in all_props if p.frame_id in fset})
    settings = {"states": states, "split_ratios": dict(zip(SPLITS, ratios)), "seed": int(seed),
                "split_unit": "participant", "deidentify": bool(deidentify),
                "blur_margin_head_sizes": margin if deidentify else None,
                "image_format": "png", "tables": tables}
    manifest = {
        "bundle": "kinemark-export", "bundle_version": 1,
        "tool": {"name": "kinemark", "version": coco.TOOL_VERSION},
        "exported_on": today,
        "skeleton": skel.to_dict(),
        "models": [{"model_id": m, "model_hash": h, "adapted": a} for m, h, a in models],
        "settings": settings,
        "counts": {"participants": len(keys), "images": len(frame_ids), "annotations": len(rows),
                   "labelled_keypoints": int(sum(int((anns[r[0]].keypoints[:, 2] > 0).sum()) for r in rows)),
                   "splits": counts},
        "splits": {s: {"coco": f"{s}/coco_{s}.json",
                       "participants": sorted(part_name[k] for k in keys if split_of[k] == s)}
                   for s in counts},
        "caution": ("Research data, not a diagnosis. The study's protocol, its ethics approval and local "
                    "privacy law come first."),
    }
    notes = []
    if unassigned:
        notes.append(f"{len(unassigned)} media have no participant; each was split as its own participant, "
                     "so the no-overlap guarantee holds only if each shows a different person")
    empty = [s for s, r in zip(SPLITS, ratios) if r > 0 and counts.get(s, {}).get("participants", 0) == 0]
    if empty:
        notes.append(f"empty split(s): {', '.join(empty)} (too few participants for the ratios)")
    manifest["notes"] = notes
    if deidentify:
        manifest["deidentification"] = {
            **deid,
            "removed": [
                "original file names and folders: frames carry random names",
                "participant codes: replaced by pseudonyms P001...",
                "staff user names: replaced by pseudonyms staff-01...",
                "frame times, frame indices and media checksums",
                "image metadata: pixels re-encoded as PNG without metadata chunks",
                "capture dates: none written (the only date is the export date)",
            ],
            "not_removed": [
                "faces of people without keypoints or model points (staff, visitors, photographs)",
                "anything else that can identify a person: body, clothing, tattoos, the room, text in the "
                "picture (name badges, burned-in dates)",
            ],
            "caution": DEID_CAUTION,
        }
    manifest["files"] = [{"path": p, "sha256": h, "bytes": n} for p, (h, n) in sorted(b.files.items())]
    b.write("manifest.json", json.dumps(manifest, indent=1).encode("utf-8"), listed=False)

    audit = {"settings": settings, "counts": manifest["counts"]}
    if deidentify:
        audit["pseudonyms"] = {"frames": {str(f): n for f, n in frame_name.items()},
                               "participants": part_name,
                               "staff": {str(u): n for u, n in staff_name.items()}}
    # the mapping back to the project is logged before the bundle is moved into place, so no
    # de-identified bundle exists without it
    store.log_event("export", "bundle", None, None, audit, user_id=who.id)
    staged.commit()
    os.chmod(out, 0o700)

    msg = (f"wrote {len(rows)} annotations on {len(frame_ids)} images of {len(keys)} participant(s) to {out} "
           f"(" + ", ".join(f"{s} {c['participants']}/{c['images']}" for s, c in counts.items())
           + " participants/images)")
    if deidentify:
        msg += (f"; faces blurred: {deid['faces_blurred_from_face_points']} from face points, "
                f"{deid['heads_blurred_from_person_box']} from the person box, "
                f"{deid['people_not_located']} not located. " + DEID_CAUTION)
    if notes:
        msg += "; " + "; ".join(notes)
    return Changes(message=msg, details={"path": str(out), "manifest": manifest})


def _deidentify_frame(project, frame_id, img, names, margin, tally, props_by_frame) -> np.ndarray:
    """Blur the face of every person on the frame who has an annotation (any state) or a
    model proposal."""
    H, W = img.shape[:2]
    people = {a.person: a for a in project.store.annotations_on_frame(frame_id)}
    props = props_by_frame.get(frame_id, {})
    regions = []
    persons = set(people) | set(props)
    for person in sorted(persons):
        a = people.get(person)
        prop = props.get(person)
        if a is not None:
            reg = face_region(a.keypoints, names, margin=margin, bbox=a.bbox, image_size=(W, H),
                              extra_face=prop.keypoints if prop is not None else None)
        else:
            reg = face_region(prop.keypoints, names, margin=margin, image_size=(W, H))
        if reg is None:
            tally["people_not_located"] += 1
            continue
        tally["faces_blurred_from_face_points" if reg.basis == "face" else "heads_blurred_from_person_box"] += 1
        regions.append(reg)
    return blur_regions(img, regions)


__all__ = ["export_bundle", "split_participants", "allocate", "check_ratios", "face_region", "blur_regions",
           "BlurRegion", "SPLITS", "DEFAULT_RATIOS", "FACE_KEYPOINTS", "DEID_CAUTION", "parquet_available"]
