"""User-level operations. The CLI and the GUI both call these.

Each mutating operation returns a :class:`~kinemark.core.model.Changes`
record saying what changed, so a front end can refresh just that. Long
operations take ``progress(done, total, message)``; they raise
:class:`KinemarkError` for anything the user can fix.
"""
from __future__ import annotations

import json
import math
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterable

import cv2
import numpy as np

from . import coco
from .errors import KinemarkError
from .media import (Probe, Sampling, check_name, list_image_folder, media_kind, probe_image, probe_video,
                    file_sha256)
from .model import ACCEPTED, IN_REVIEW, STATES, Changes
from .project import Project
from .skeleton import Skeleton

Progress = object  # callable(done, total, message) or None


def _tick(progress, done, total, message):
    if progress is not None:
        progress(done, total, message)


# ---- project ------------------------------------------------------------------------

def new_project(root, skeleton: Skeleton, *, owner: str | None = None,
                media_root: str | None = None, db: str | None = None,
                schema: str | None = None) -> Project:
    return Project.create(root, skeleton, owner=owner, media_root=media_root, db=db, schema=schema)


# ---- media --------------------------------------------------------------------------

@dataclass
class AddReport:
    added: list            # (path, media id, frames)
    duplicates: list       # (path, existing media path)
    skipped: list          # (path, reason) non-media files in folders
    failed: list           # (path, message) files that could not be imported
    thinned: list = field(default_factory=list)   # (folder, images kept, images in it) by the sampling rule


NOT_MEDIA = "not an image or video"
BAD_NAME = "its name is not valid UTF-8 text (rename the file)"
MAX_SESSION = 1_000_000


def _expand(paths: Iterable[Path], sampling: Sampling = Sampling()) -> tuple[list[Path], list, list]:
    """The files to import, the folder entries skipped with a reason, and the image folders the
    sampling rule thinned ((folder, kept, total)).

    A media file in a folder whose name is not UTF-8 is skipped (OpenCV would
    crash on it, see :func:`.media.check_name`); a file named on its own is
    refused later, like any other unreadable file. The images of a folder are
    taken as a sequence in name order: ``every`` N keeps every Nth, ``count`` K
    keeps K evenly spaced; ``seconds`` is refused (images have no frame times).
    """
    files, skipped, thinned = [], [], []
    for p in paths:
        p = Path(p)
        if p.is_dir():
            check_name(p)
            imgs, other = list_image_folder(p)
            vids = [o for o in other if media_kind(o) == "video"]
            if not imgs and not vids:
                raise KinemarkError("the folder holds no images or videos", where=str(p))
            if imgs and sampling.seconds is not None:
                raise KinemarkError("a folder of images has no frame times, so it cannot be sampled by "
                                    "seconds; use --every N or --count K (taken in file-name order)",
                                    where=str(p))
            if imgs and (sampling.count is not None or (sampling.every or 1) > 1):
                keep = sampling.indices(len(imgs), None)
                thinned.append((p, len(keep), len(imgs)))
                imgs = [imgs[i] for i in keep]
            for f in imgs + vids:
                try:
                    check_name(f)
                    files.append(f)
                except KinemarkError:
                    skipped.append((f, BAD_NAME))
            skipped.extend((o, NOT_MEDIA) for o in other if media_kind(o) is None)
        else:
            files.append(p)
    return files, skipped, thinned


def add_media(project: Project, paths: Iterable, *, participant: str | None = None,
              session: int | None = None, sampling: Sampling = Sampling(), user: str | None = None,
              progress=None, strict: bool = True) -> tuple[Changes, AddReport]:
    """Import videos, image folders or single images.

    With ``strict`` a file that cannot be read stops the whole call with its
    message before anything is written for it; otherwise it is reported in
    ``AddReport.failed`` and the others go on. Each media is its own
    transaction: a failure never leaves a half-imported file behind.
    """
    who = project.user(user)
    files, skipped, thinned = _expand(paths, sampling)
    if not files and not skipped:
        raise KinemarkError("nothing to add")
    if session is not None and not participant:
        raise KinemarkError("--session needs --participant")
    if session is not None and not (isinstance(session, int) and not isinstance(session, bool)
                                    and 1 <= session <= MAX_SESSION):
        raise KinemarkError(f"--session must be a whole number from 1 to {MAX_SESSION:,}, not {session}")
    report = AddReport([], [], skipped, [], thinned)
    # Phase 1: read and check every file; nothing is written yet.
    probed = []
    seen_sha = {}
    for n, path in enumerate(files):
        _tick(progress, n, len(files), f"reading {path.name}")
        try:
            check_name(path)          # before any message or OpenCV call uses the name
            if not path.exists():
                raise KinemarkError("file or folder not found", where=str(path))
            kind = media_kind(path)
            if kind is None:
                raise KinemarkError(f"unsupported file type {path.suffix or '(none)'!r}; videos: "
                                    "mp4, mov, avi, mkv ...; images: png, jpg, tif ...", where=str(path))
            probe: Probe = probe_image(path) if kind == "image" else probe_video(path, sampling)
            sha = file_sha256(path)
            dup = project.store.media_by_sha(sha)
            if dup is not None or sha in seen_sha:
                report.duplicates.append((path, dup.path if dup else str(seen_sha[sha])))
                continue
            seen_sha[sha] = path
            probed.append((path, kind, sha, probe))
        except KinemarkError as e:
            if strict:
                raise
            report.failed.append((path, str(e)))
    # Phase 2: write them all in one transaction.
    media_ids, frame_ids = [], []
    with project.store.tx():
        session_id = None
        if participant and probed:
            p = project.store.participant(participant, create=True, user_id=who.id)
            session_id = project.store.session(p.id, session or 1, create=True, user_id=who.id).id
        for path, kind, sha, probe in probed:
            stored, base = project.stored_path(path)
            frames = [(i, (i / probe.fps) if probe.fps else None, probe.checksums[i])
                      for i in sorted(probe.checksums)]
            media, fids = project.store.add_media(
                session_id=session_id, kind=kind, path=stored, path_base=base, sha256=sha,
                fps=probe.fps, frame_count=probe.frame_count, width=probe.width, height=probe.height,
                frames=frames, user_id=who.id)
            media_ids.append(media.id)
            frame_ids.extend(fids)
            report.added.append((path, media.id, len(fids)))
    _tick(progress, len(files), len(files), "done")
    msg = f"added {len(report.added)} media ({len(frame_ids)} frames)"
    if report.duplicates:
        msg += f", {len(report.duplicates)} already in the project"
    not_media = sum(1 for _, why in report.skipped if why == NOT_MEDIA)
    if not_media:
        msg += f", skipped {not_media} non-media file(s)"
    bad_names = sum(1 for _, why in report.skipped if why == BAD_NAME)
    if bad_names:
        msg += f", skipped {bad_names} media file(s) whose names are not valid UTF-8"
    if report.failed:
        msg += f", {len(report.failed)} failed"
    for folder, kept, total in thinned:
        msg += f"; kept {kept} of the {total} images in {folder.name} ({sampling.describe()})"
    return Changes(media=tuple(media_ids), frames=tuple(frame_ids), message=msg), report


def _same_recording(media, probe: Probe, path: Path):
    """Refuse a file whose frames cannot be the stored ones: other size, length or frame rate.

    The stored keypoints are pixel positions on particular frames, so a file of
    another size puts them at the wrong scale, and one of another length or frame
    rate is another recording (or a cut of it). A re-encode or remux may gain or
    lose a frame or two at the end, so the count may differ by 1% (at least 2 frames).
    """
    if (probe.width, probe.height) != (media.width, media.height):
        raise KinemarkError(f"the new file's frames are {probe.width}x{probe.height}, not {media.width}x"
                            f"{media.height} as imported: it is a different (or resized) video and the "
                            f"keypoints would be at the wrong scale", where=str(path))
    slack = max(2, round(0.01 * media.frame_count))
    if abs(probe.frame_count - media.frame_count) > slack:
        raise KinemarkError(f"the new file has {probe.frame_count} frames, not {media.frame_count} as "
                            f"imported: it is a different (or cut) recording", where=str(path))
    if media.fps and probe.fps and abs(probe.fps - media.fps) > 0.01 * media.fps:
        raise KinemarkError(f"the new file runs at {probe.fps:g} fps, not {media.fps:g} as imported: it is "
                            f"a different (or converted) recording", where=str(path))


def relink(project: Project, media_id: int, new_path: str | Path | None = None, *,
           accept_changed_pixels: bool = False, user: str | None = None) -> Changes:
    """Accept the file now on disk (or at ``new_path``) for a media, re-checking every frame.

    Refused if the new file is not the same recording (:func:`_same_recording`),
    lacks one of the sampled frames, or is already another media of the project.
    A moved or copied file decodes to the same pixels and is accepted. A
    re-encoded copy decodes to slightly different pixels, and checksums cannot
    tell that from a different recording of the same size and length; so when
    most sampled frames' pixels changed, the relink is refused unless
    ``accept_changed_pixels`` (``--accept-changed-pixels``) says a person has
    looked at the frames and confirms it. Nothing is written when refused.
    """
    who = project.user(user)
    media = project.store.media(media_id)
    path = Path(new_path) if new_path else project.media_path(media)
    check_name(path)
    if not path.exists():
        raise KinemarkError("file not found", where=str(path))
    kind = media_kind(path)
    if kind is not None and kind != media.kind:
        raise KinemarkError(f"the new file is {'an' if kind == 'image' else 'a'} {kind}, but this media is "
                            f"{'an' if media.kind == 'image' else 'a'} {media.kind}", where=str(path))
    frames = project.store.frames(media_id)
    if media.kind == "image":
        probe = probe_image(path)
    else:
        probe = probe_video(path, Sampling(every=1))      # checks the file is readable
    sha = file_sha256(path)
    other = project.store.media_by_sha(sha)
    if other is not None and other.id != media_id:
        raise KinemarkError(f"this file is already in the project as media {other.id} ({other.path})",
                            where=str(path))
    _same_recording(media, probe, path)
    shas = {}
    for f in frames:
        if f.frame_index not in probe.checksums:
            raise KinemarkError(f"the new file has no frame {f.frame_index}; it cannot replace this media",
                                where=str(path))
        shas[f.frame_index] = probe.checksums[f.frame_index]
    changed = sum(1 for f in frames if shas[f.frame_index] != f.pixel_sha)
    if 2 * changed > len(frames) and not accept_changed_pixels:
        raise KinemarkError(f"{changed} of {len(frames)} sampled frames decode to different pixels than at "
                            f"import: this is a re-encoded copy or a different recording. Compare a few "
                            f"frames; if it is the same recording, run again with --accept-changed-pixels",
                            where=str(path))
    stored, base = project.stored_path(path)
    with project.store.tx():
        project.store.update_frame_checksums(media_id, shas, user_id=who.id)
        project.store.set_media_status(media_id, "ok", sha256=sha, path=stored,
                                       path_base=base, user_id=who.id)
    src = project._sources.pop(media_id, None)
    if src:
        src.close()
    return Changes(media=(media_id,), frames=tuple(f.id for f in frames),
                   message=f"relinked media {media_id}; {changed} of {len(frames)} frames' pixels changed")


# ---- the study's target ----------------------------------------------------------------

TARGET_KEY = "target_frames"
DEFAULT_TARGET = 200
MAX_TARGET = 1_000_000


def target(project: Project) -> int:
    """The study's target number of accepted frames (``DEFAULT_TARGET`` until one is set)."""
    try:
        n = int(project.store.get_meta(TARGET_KEY, str(DEFAULT_TARGET)))
    except ValueError:
        return DEFAULT_TARGET
    return n if n >= 1 else DEFAULT_TARGET


def set_target(project: Project, frames, *, user: str | None = None) -> Changes:
    """Set how many accepted frames the study needs (the progress shown to everyone).

    Only a reviewer or an admin may: the target comes from the study's protocol.
    The change is kept in the audit trail with its old value.
    """
    from .review import REVIEWER_ROLES
    try:
        n = int(frames)
    except (TypeError, ValueError):
        raise KinemarkError(f"the target must be a whole number of frames, not {frames!r}") from None
    if isinstance(frames, float) and frames != n:
        raise KinemarkError(f"the target must be a whole number of frames, not {frames!r}")
    if not 1 <= n <= MAX_TARGET:
        raise KinemarkError(f"the target must be between 1 and {MAX_TARGET:,} frames, not {n}")
    who = project.user(user)
    if who.role not in REVIEWER_ROLES:
        raise KinemarkError(f"{who.name} is an {who.role}; only a reviewer or admin sets the study's target")
    before = target(project)
    project.store.set_meta(TARGET_KEY, str(n), user_id=who.id)
    return Changes(message=f"target: {n} accepted frames (was {before})", details={"target": n})


# ---- summary ------------------------------------------------------------------------

def info(project: Project) -> dict:
    s = project.store
    media = s.all_media()
    kept = s.frame_counts_by_media()
    return {
        # (id, participant, session, kind, frames kept, status, stored path): the id is what
        # relink asks for
        "media_list": [(m.id, m.participant_code, m.session_number, m.kind, kept.get(m.id, 0), m.status, m.path)
                       for m in media],
        "root": str(project.root),
        "skeleton": project.skeleton.name,
        "keypoints": project.skeleton.num_keypoints,
        "media": len(media),
        "frames": s.frame_count(),
        "states": s.state_counts(),
        "participants": s.counts_by_participant(),
        "schema_version": s.version(),
    }


# ---- export -------------------------------------------------------------------------

def _check_states(states):
    states = list(states)
    bad = [x for x in states if x not in STATES]
    if bad:
        raise KinemarkError(f"unknown state(s) {', '.join(bad)}; states are {', '.join(STATES)}")
    return states


def export_coco(project: Project, out: str | Path, *, states=(ACCEPTED,), fmt: str = "coco",
                images_to: str | Path | None = None, progress=None,
                date_created: str | None = None, overwrite: bool = True) -> Changes:
    """Write a COCO keypoints file (``fmt='coco'``) or a COCO results file (``'coco-results'``).

    Results are the stored model proposals for frames in ``states`` (or all
    proposed frames when ``states`` is empty), for scoring with the reference evaluator.

    The paths are checked before any work (:class:`.export.Targets`: never onto the
    project's database or its media; an existing file only with ``overwrite``, which
    the command line asks for as ``--overwrite``). Everything is written under temporary
    names and moved into place at the end (:class:`.export.Staged`): a frame that fails
    its checksum leaves neither PNGs in ``images_to`` nor a half-written ``out``.
    """
    from .export import Staged, Targets, nothing_to_export
    states = _check_states(states)
    if fmt not in ("coco", "coco-results"):
        raise KinemarkError(f"unknown export format {fmt!r}; use coco or coco-results")
    targets = Targets(project)
    out = targets.file(Path(out), overwrite=overwrite)
    rows = project.store.export_rows(states) if fmt == "coco" or states else []
    frames = {r[1]: (r[6], r[7]) for r in rows}          # frame id -> (media id, frame index), in row order
    if fmt == "coco" and images_to is not None:
        images_to = targets.folder(Path(images_to), what="--images-to")
        targets.files_in(images_to, [coco.frame_file_name(m, i) for m, i in frames.values()], overwrite=overwrite)
    with Staged() as staged:
        if fmt == "coco":
            data = coco.build_coco(rows, project.skeleton, date_created=date_created)
            if images_to is not None:
                stage = staged.folder(images_to)
                for n, (media_id, frame_index) in enumerate(frames.values()):
                    img = project.read_frame(media_id, frame_index)
                    name = coco.frame_file_name(media_id, frame_index)
                    ok, png = cv2.imencode(".png", img)
                    if not ok:
                        raise KinemarkError("cannot write image", where=str(images_to / name))
                    staged.put(stage, name, png.tobytes())
                    _tick(progress, n + 1, len(frames), "writing frames")
            staged.file(out, json.dumps(data))
            msg = f"wrote {len(data['annotations'])} annotations on {len(data['images'])} images to {out}"
            if not rows:
                msg += f"; {nothing_to_export(project, states)}"
        else:
            wanted = set(frames) if states else None
            results = [coco.results_entry(p.frame_id, p.keypoints, p.score)
                       for p in project.store.proposals() if wanted is None or p.frame_id in wanted]
            staged.file(out, json.dumps(results))
            msg = f"wrote {len(results)} model results to {out}"
        staged.commit()
    return Changes(message=msg, details={"path": str(out)})


# ---- import -------------------------------------------------------------------------

IMPORT_POLICIES = ("skip", "refuse")


def import_coco(project: Project, file: str | Path, images_root: str | Path, *, policy: str = "refuse",
                state: str = IN_REVIEW, participant: str | None = None, user: str | None = None,
                progress=None) -> tuple[Changes, coco.ImportPlan]:
    """Import a COCO keypoints file, all in one transaction.

    ``policy='refuse'``: any problem refuses the whole file (nothing written).
    ``policy='skip'``: bad records are skipped and reported; the rest is imported.
    """
    if policy not in IMPORT_POLICIES:
        raise KinemarkError(f"unknown import policy {policy!r}; use skip or refuse")
    if state not in STATES:
        raise KinemarkError(f"unknown state {state!r}")
    who = project.user(user)
    root = Path(images_root)
    if not root.is_dir():
        raise KinemarkError("the image folder does not exist", where=str(root))
    data = coco.load_json(Path(file))
    plan = coco.plan_import(data, project.skeleton, root, source=str(file))
    if plan.problems and policy == "refuse":
        shown = "; ".join(str(p) for p in plan.problems[:5])
        more = f" (and {len(plan.problems) - 5} more)" if len(plan.problems) > 5 else ""
        raise KinemarkError(f"{len(plan.problems)} problem(s), nothing imported: {shown}{more}. "
                            f"Fix the file, or import with --on-problem skip to leave those records out",
                            where=str(file))
    store = project.store
    frame_for_image: dict = {}
    media_ids, ann_ids = [], []
    with store.tx():
        session_id = None
        if participant:
            p = store.participant(participant, create=True, user_id=who.id)
            session_id = store.session(p.id, 1, create=True, user_id=who.id).id
        for n, (iid, path, w, h) in enumerate(plan.images):
            _tick(progress, n, len(plan.images), "reading images")
            try:
                probe = probe_image(path)
            except KinemarkError as e:
                if policy == "refuse":
                    raise
                plan.problems.append(coco.Problem(f"image id {iid}", str(e)))
                continue
            if (w and int(w) != probe.width) or (h and int(h) != probe.height):
                msg = (f"file is {probe.width}x{probe.height} but the COCO entry says {w}x{h}")
                if policy == "refuse":
                    raise KinemarkError(msg, where=f"{file}: image id {iid}")
                plan.problems.append(coco.Problem(f"image id {iid}", msg))
                continue
            sha = file_sha256(path)
            existing = store.media_by_sha(sha)
            if existing is not None:
                frame_for_image[iid] = store.frames(existing.id)[0].id
                continue
            stored, base = project.stored_path(path)
            media, fids = store.add_media(session_id=session_id, kind="image", path=stored, path_base=base,
                                          sha256=sha, fps=None, frame_count=1, width=probe.width,
                                          height=probe.height, frames=[(0, None, probe.checksums[0])],
                                          user_id=who.id)
            media_ids.append(media.id)
            frame_for_image[iid] = fids[0]
        per_frame: dict = {}
        K = project.skeleton.num_keypoints
        already = 0
        for aid, iid, arr, bbox in plan.annotations:
            fid = frame_for_image.get(iid)
            if fid is None:
                continue
            # the same person's keypoints already on this frame (the file, or this record,
            # imported before): importing them again would count one person twice
            if any(a.keypoints.shape == np.shape(arr) and np.allclose(a.keypoints, arr, atol=1e-6)
                   for a in store.annotations_on_frame(fid)):
                already += 1
                continue
            person = per_frame.get(fid, 0)
            while store.annotation(fid, person) is not None:
                person += 1
            per_frame[fid] = person + 1
            a = store.save_annotation(fid, arr, ["imported"] * K, state=state, person=person, bbox=bbox,
                                      user_id=who.id, action="import")
            ann_ids.append(a.id)
    msg = (f"imported {len(ann_ids)} annotation{'s' * (len(ann_ids) != 1)} on {len(frame_for_image)} "
           f"image{'s' * (len(frame_for_image) != 1)}")
    if already:
        msg += f"; left out {already} annotation{'s' * (already != 1)} already in the project (same keypoints)"
    if plan.problems:
        msg += f"; skipped {len(plan.problems)} bad record(s)"
    if plan.notices:
        msg += f"; ignored {len(plan.notices)} non-person or crowd record(s)"
    return Changes(media=tuple(media_ids), annotations=tuple(ann_ids), message=msg), plan


# ---- proposals ----------------------------------------------------------------------

def propose(project: Project, *, frames: str = "unlabelled", frame_ids=None, workers: int = 1,
            progress=None, cancel=None, adapter=None, boxes=None):
    """Pre-fill frames with the project's pose model (see :mod:`.prefill`; ``boxes`` there).
    Returns (Changes, report)."""
    from .prefill import prefill
    return prefill(project, frames=frames, frame_ids=frame_ids, workers=workers, progress=progress,
                   cancel=cancel, adapter=adapter, boxes=boxes)


def follow_person(project: Project, frame_id: int, *, box=None, adapter=None, progress=None, cancel=None):
    """Propose the rest of the frame's video again, following one person (see
    :func:`.prefill.follow_person`). Returns (Changes, report)."""
    from .prefill import follow_person as follow
    return follow(project, frame_id, box=box, adapter=adapter, progress=progress, cancel=cancel)


# ---- queue and adaptation --------------------------------------------------------------

def rank(project: Project, batch: int = 50):
    """The ranked queue (see :mod:`.ranking`): a list of QueueEntry with plain-words reasons."""
    from .ranking import rank_queue
    return rank_queue(project, batch)


def adapt(project: Project, *, with_embedding: bool = True, user: str | None = None):
    """Refit the per-project correction (see :mod:`.adapt`). Returns (Changes, Correction)."""
    from .adapt import fit_project
    return fit_project(project, with_embedding=with_embedding, user=user)


def tune(project: Project, *, user: str | None = None, progress=None, cancel=None):
    """Tune the model's heatmap layers on the project's labels (see :mod:`.tuning`).
    Returns (Changes, Tuning)."""
    from .tuning import tune_project
    return tune_project(project, user=user, progress=progress, cancel=cancel)


def tuning_suggestion(project: Project) -> str:
    """A plain-words suggestion to tune the model now, or "" (see :func:`.tuning.suggestion`)."""
    from .tuning import suggestion
    return suggestion(project)


def untune(project: Project, *, user: str | None = None):
    """Stop using the project's tuned model. Returns (Changes, Tuning or None)."""
    from .tuning import untune as _untune
    return _untune(project, user=user)


# ---- team mode ----------------------------------------------------------------------------

# how long a claimed batch may be kept from the rest of the team (a project choice: a working
# day and a half at most, so a forgotten lease returns by the next morning)
MIN_LEASE_MINUTES, MAX_LEASE_MINUTES = 1.0, 36 * 60.0


def claim_batch(project: Project, n: int = 20, *, lease_minutes: float = 60.0, user: str | None = None):
    """Take the next ``n`` frames of the ranked queue as a lease, so nobody else gets them.

    Frames leased to someone else are skipped; your own live leases are renewed and count
    towards ``n``. Returns (Changes, new frame ids, renewed frame ids).
    """
    from .ranking import rank_queue
    if n < 1:
        raise KinemarkError("a batch needs at least one frame")
    if not (math.isfinite(lease_minutes) and MIN_LEASE_MINUTES <= lease_minutes <= MAX_LEASE_MINUTES):
        raise KinemarkError(f"--minutes must be from {MIN_LEASE_MINUTES:g} to {MAX_LEASE_MINUTES:g} (a lease "
                            f"hides the frames from the rest of the team until it ends), not {lease_minutes:g}")
    who = project.user(user)
    want = n
    new, renewed = [], []
    tried = set()
    for attempt in range(4):     # others may win some frames meanwhile: ask the queue for more
        others = {f for f, (u, _) in project.store.claims().items() if u != who.id}
        queue = rank_queue(project, want + len(others) + len(tried))
        cand = [e.frame_id for e in queue if e.frame_id not in others and e.frame_id not in tried]
        if attempt and not cand:
            break
        got, mine = project.store.claim_frames(who.id, cand, n, lease_minutes * 60.0)
        new += got
        # the leases held before this call; later passes also see the frames taken just now
        # (before, those were counted twice: once new, once renewed)
        taken = set(new)
        renewed = [f for f in mine if f not in taken]
        tried |= set(cand)
        if len(new) + len(renewed) >= n or not cand:
            break
    msg = (f"{who.name} holds {len(new) + len(renewed)} frame(s) for {lease_minutes:g} min "
           f"({len(new)} new, {len(renewed)} renewed)")
    return Changes(frames=tuple(new), message=msg), new, renewed
