"""Batch pre-fill: run the pose model over many frames, store proposals, pre-fill labels.

Resumable (frames already proposed by the same model hash are skipped), one
bad frame never stops a batch (its error is counted and reported), and a
person's points are never written over: only frames with no annotation, or
whose annotation is still the untouched model proposal, are pre-filled.
"""
from __future__ import annotations

import os
import queue
import threading
import time
from dataclasses import dataclass, field

import numpy as np

from .errors import KinemarkError
from .model import PREFILLED, Changes

_MODEL_SOURCES = {"model", "adapted"}


@dataclass
class PrefillReport:
    model_id: str
    model_hash: str
    candidates: int = 0
    proposed: int = 0
    already_done: int = 0
    human_kept: int = 0
    failed: list = field(default_factory=list)   # (frame_id, message)
    seconds: float = 0.0
    cancelled: bool = False

    def summary(self) -> str:
        rate = self.proposed / self.seconds if self.seconds > 0 else 0.0
        return (f"{self.model_id}: proposed {self.proposed} frame(s) in {self.seconds:.1f} s "
                f"({rate:.1f} frames/s); {self.already_done} already proposed by this model" + self.outcome())

    def outcome(self) -> str:
        """What else happened, for the end of a message: kept labels, failures, a cancel."""
        s = ""
        if self.human_kept:
            s += f"; {self.human_kept} with a person's labels left untouched"
        if self.failed:
            s += f"; {len(self.failed)} failed (first: frame {self.failed[0][0]}: {self.failed[0][1]})"
        if self.cancelled:
            s += "; cancelled"
        return s


def _is_untouched(ann) -> bool:
    return ann is None or (ann.state == PREFILLED and set(ann.sources) <= _MODEL_SOURCES)


def candidate_frames(project, which: str = "unlabelled"):
    """Frames to pre-fill: 'unlabelled' (no person's work on them yet) or 'all'."""
    if which not in ("unlabelled", "all"):
        raise KinemarkError(f"--frames must be 'unlabelled' or 'all', not {which!r}")
    frames = project.store.frames()
    if which == "all":
        return frames
    touched = {a.frame_id for a in project.store.annotations() if not _is_untouched(a)}
    return [f for f in frames if f.id not in touched]


# a person's box smaller than this (frame pixels, either side) is refused: a slip of the mouse
MIN_BOX = 8.0
# the model looks at the box grown by this share of its size on every side: people draw boxes
# tight around the body, and this model wants room around it (a project choice, measured on the
# demo renders: see box_region)
BOX_MARGIN = 0.2


def box_region(box, width: int, height: int):
    """The crop region for a person's box ``(x0, y0, x1, y1)`` in frame pixels (corners in any
    order): clipped to the frame, upright, then grown by ``BOX_MARGIN`` on every side (the crop
    may reach past the frame's edges); a clear KinemarkError for a box that is not one.

    Measured on the Quillon Bay demo renders (invented data; every fifth frame, 157 per draw,
    the exact truth box as the drawn box; one person per frame, so this measures what the box
    costs, not what it gains beside a second person). Mean OKS, margin 0.2 / 0.3 / 0.4 / 0.5 /
    none (the box as drawn) / no box at all (the model's own crops): sample draw 0.757 / 0.759 /
    0.709 / 0.704 / 0.695 / 0.761; second draw (seed 23) 0.749 / 0.722 / 0.709 / 0.686 / 0.695 /
    0.771. Frames below OKS 0.5 with margin 0.2: 7 % and 12 % (as drawn 27 % and 24 %; no box
    6 % and 3 %). Over every frame (783 and 784): on the frames where the model's own pose was
    below OKS 0.5 (36 and 21), the box raised the mean OKS from 0.418 to 0.495 and from 0.406 to
    0.522, and lifted 12 and 8 of them above 0.5; but boxing every frame would have put 36 and
    71 others below 0.5. A box is for a frame whose proposal is wrong, not for every frame."""
    from .pose.base import Region
    try:
        x0, y0, x1, y1 = (float(v) for v in box)
    except (TypeError, ValueError):
        raise KinemarkError("a person's box is four numbers: x0, y0, x1, y1 in frame pixels") from None
    if not np.isfinite([x0, y0, x1, y1]).all():
        raise KinemarkError("a person's box must be finite numbers")
    x0, x1 = sorted((min(max(x0, -0.5), width - 0.5), min(max(x1, -0.5), width - 0.5)))
    y0, y1 = sorted((min(max(y0, -0.5), height - 0.5), min(max(y1, -0.5), height - 0.5)))
    if x1 - x0 < MIN_BOX or y1 - y0 < MIN_BOX:
        raise KinemarkError(f"the box ({x1 - x0:.0f} x {y1 - y0:.0f} px inside the frame) is too small: "
                            f"draw it around the whole person")
    grow = 1.0 + 2.0 * BOX_MARGIN
    return Region((x0 + x1) / 2, (y0 + y1) / 2, (x1 - x0) * grow, (y1 - y0) * grow, 0.0, "drawn")


def _usable(res) -> bool:
    """A pose good enough to place the crop of a neighbouring frame (or a second look)."""
    return res.score >= 0.5 and np.count_nonzero(res.keypoints[:, 2] > 0) >= 4


def predict_in_box(adapter, img, region):
    """The model's pose of the person in ``region`` (a person's box): the model runs on the box,
    then once more on the crop its own pose gives (as for a neighbouring frame), which is kept
    when that pose is usable and scores no lower."""
    first = adapter.predict(img, region=region)
    if not _usable(first):
        return first
    second = adapter.predict(img, previous=first.keypoints)
    return second if _usable(second) and second.score >= first.score else first


def _proposals(p, adapter, items, cancel, max_gap, boxes=None):
    """Yield (frame, PoseResult or None, error message or None) for ``items`` in order."""
    prev_media, prev_index, prev_kps = None, None, None
    for f in items:
        if cancel.is_set():
            break
        try:
            img = p.read_frame(f.media_id, f.frame_index)
            hint = None
            if (prev_media == f.media_id and prev_kps is not None
                    and 0 < f.frame_index - prev_index <= max_gap):
                hint = prev_kps
            if boxes and f.id in boxes:
                res = predict_in_box(adapter, img, boxes[f.id])
            else:
                res = adapter.predict(img, previous=hint)
            ok = _usable(res)
            prev_media, prev_index, prev_kps = f.media_id, f.frame_index, (res.keypoints if ok else None)
            yield f, res, None
        except Exception as e:  # isolate: one bad frame never stops the batch
            msg = str(e) if isinstance(e, KinemarkError) else f"{type(e).__name__}: {e}"
            prev_kps = None
            yield f, None, msg


def _worker(root, make_adapter, items, out_q, cancel, max_gap, boxes=None):
    from .project import Project
    try:
        adapter = make_adapter()
        with Project.open(root) as p:
            for item in _proposals(p, adapter, items, cancel, max_gap, boxes):
                out_q.put(item)
    except Exception as e:
        out_q.put((None, None, str(e) if isinstance(e, KinemarkError) else f"{type(e).__name__}: {e}"))
    finally:
        out_q.put(("done", None, None))


def _from_workers(threads, out_q):
    """Yield the workers' items until every worker has said it is done."""
    running = len(threads)
    while running:
        item = out_q.get()
        if item[0] == "done":
            running -= 1
            continue
        yield item


def split_runs(frames, workers: int, min_run: int = 8) -> list[list]:
    """Share frames (sorted by media, then frame index) among ``workers``.

    Each share is made of whole runs of consecutive frames from one video, so a
    worker decodes in order and the neighbouring-pose crop carries on within
    its runs. When there are fewer videos than workers, the longest run is cut
    in half (never into runs shorter than ``min_run``), so a single long video
    still keeps every worker busy; each cut costs one whole-frame first pass.
    Runs go to the least loaded share, longest first.
    """
    runs: list[list] = []
    for f in frames:
        if runs and runs[-1][-1].media_id == f.media_id:
            runs[-1].append(f)
        else:
            runs.append([f])
    workers = max(1, int(workers))
    while len(runs) < workers:
        longest = max(range(len(runs)), key=lambda i: len(runs[i]), default=None)
        if longest is None or len(runs[longest]) < 2 * min_run:
            break
        run = runs.pop(longest)
        half = len(run) // 2
        runs[longest:longest] = [run[:half], run[half:]]
    shards: list[list] = [[] for _ in range(min(workers, max(1, len(runs))))]
    for run in sorted(runs, key=len, reverse=True):
        min(shards, key=len).extend(run)
    return shards


def prefill(project, *, frames: str = "unlabelled", frame_ids=None, adapter=None, make_adapter=None,
            workers: int = 1, progress=None, cancel: threading.Event | None = None,
            max_gap: int = 2, corrector=None, boxes: dict | None = None) -> tuple[Changes, PrefillReport]:
    """Propose keypoints for many frames and pre-fill their labels.

    ``adapter``: an already loaded model (used by a single worker); or
    ``make_adapter``: a factory called once per worker thread (each worker
    gets its own ONNX Runtime session and its own project connection for
    reading frames). Default: the project's model (:func:`pose.load_adapter`).
    ``max_gap``: a proposal on a frame at most this many video frames before
    the next sampled one seeds that frame's crop (the neighbouring-pose crop).
    ``corrector``: optional per-project correction (``adapt``) applied before
    pre-filling; the raw proposal is stored either way.
    ``boxes``: ``{frame id: (x0, y0, x1, y1)}``, a box a person drew around the one person the
    model should look at (another person in the frame, say a therapist, drew its eye): those
    frames are proposed from the box (:func:`predict_in_box`) even when this model proposed
    them before, and the new proposal replaces the old one. Frames in ``boxes`` must be among
    the frames asked for. The rule for a person's points stays: they are never written over.
    """
    from .pose import load_adapter
    t0 = time.perf_counter()
    cores = os.cpu_count() or 1
    if not 1 <= int(workers) <= cores:
        raise KinemarkError(f"--workers must be between 1 and {cores} (this machine's cores), not {workers}: "
                            "each worker runs its own copy of the model")
    workers = int(workers)
    own_threads = None          # ONNX Runtime threads of the sessions this call loads itself
    if adapter is None and make_adapter is None:
        ort_threads = own_threads = max(1, 2 // workers)
        adapter = load_adapter(project, threads=ort_threads)   # fail early, clearly, if the model is bad
        if workers > 1:
            make_adapter = lambda: load_adapter(project, threads=ort_threads)  # noqa: E731
    if adapter is None:
        adapter = make_adapter()
    report = PrefillReport(adapter.model_id, adapter.model_hash)
    if corrector is None:
        corrector = _project_corrector(project, adapter)
    regions = {}
    if boxes:
        for fid, box in boxes.items():
            f = project.store.frame(fid)
            m = project.store.media(f.media_id)
            regions[fid] = box_region(box, m.width, m.height)
    cand = candidate_frames(project, frames)
    if frame_ids is not None:
        wanted = set(frame_ids)
        cand = [f for f in cand if f.id in wanted]
    missing = set(regions) - {f.id for f in cand}
    if missing:
        raise KinemarkError(f"frame(s) {', '.join(map(str, sorted(missing)))} have a box but are not "
                            f"among the frames to propose")
    report.candidates = len(cand)
    done = project.store.proposed_frame_ids(adapter.model_hash) - set(regions)
    todo = [f for f in cand if f.id not in done]
    report.already_done = len(cand) - len(todo)
    todo.sort(key=lambda f: (f.media_id, f.frame_index))

    shards = split_runs(todo, workers if make_adapter is not None else 1)
    if len(shards) == 1 and own_threads is not None and own_threads < 2 and todo:
        # too few frames to share among the workers: the one worker gets a session with the
        # threads the others would have had, rather than running on a single thread
        adapter = load_adapter(project, threads=2)
    cancel = cancel or threading.Event()
    threads = []
    if len(shards) == 1:
        # one worker: run in this thread. A second thread would only compete with ONNX
        # Runtime's own threads for the CPU while it stores.
        items = _proposals(project, adapter, shards[0], cancel, max_gap, regions)
    else:
        out_q: queue.Queue = queue.Queue(maxsize=64)
        for n, shard in enumerate(shards):
            mk = (lambda a=adapter: a) if n == 0 else make_adapter
            t = threading.Thread(target=_worker, args=(project.root, mk, shard, out_q, cancel, max_gap, regions),
                                 daemon=True)
            t.start()
            threads.append(t)
        items = _from_workers(threads, out_q)

    proposal_ids, ann_ids = _store_all(project, adapter, items, len(todo), corrector, report, progress)
    for t in threads:
        t.join()
    report.cancelled = cancel.is_set()
    report.seconds = time.perf_counter() - t0
    return (Changes(proposals=tuple(proposal_ids), annotations=tuple(ann_ids), message=report.summary()),
            report)


def _project_corrector(project, adapter):
    """The project's stored correction for this model, ready to apply, or None."""
    from .adapt import Corrector, load_correction
    corr = load_correction(project, adapter.model_hash)
    return Corrector(corr) if corr is not None else None


def _store_all(project, adapter, items, total, corrector, report, progress):
    """Store each (frame, result, error) of ``items``: the proposal always, the pre-fill only on
    an untouched frame (a person's points are never written over). Returns (proposal ids,
    annotation ids); counts go into ``report``."""
    proposal_ids, ann_ids = [], []
    n_done = 0
    store = project.store
    for f, res, err in items:
        if f is None:   # a worker could not start
            report.failed.append((None, err))
            continue
        n_done += 1
        if err is not None:
            report.failed.append((f.id, err))
        else:
            try:
                with store.tx():
                    pid = store.save_proposal(
                        f.id, model_id=adapter.model_id, model_hash=adapter.model_hash,
                        keypoints=res.keypoints, confidence=res.confidence, signals=res.signals,
                        score=res.score, region=_region_dict(res.region), embedding=res.embedding,
                        adapted=getattr(adapter, "adapted", False))
                    proposal_ids.append(pid)
                    ann = store.annotation(f.id)
                    if _is_untouched(ann):
                        kps = res.keypoints
                        tuned = getattr(adapter, "adapted", False)
                        sources = ["adapted" if tuned and v > 0 else "model" for v in kps[:, 2]]
                        if corrector is not None:
                            kps, sources = corrector.apply(res, kps, sources)
                        # checked against the version read: a person's save landing in
                        # between (team mode) is refused, not overwritten
                        a = store.save_annotation(f.id, kps, sources, state=PREFILLED, action="prefill",
                                                  expected_version=ann.version if ann is not None else 0)
                        ann_ids.append(a.id)
                    else:
                        report.human_kept += 1
                report.proposed += 1
            except Exception as e:
                report.failed.append((f.id, str(e) if isinstance(e, KinemarkError) else f"{type(e).__name__}: {e}"))
        if progress is not None:
            progress(n_done, total, f"proposing ({len(report.failed)} failed)")
    return proposal_ids, ann_ids


def _pose_box(kps):
    """(x0, y0, x1, y1) around a pose's visible points, or None with fewer than 4 of them."""
    kps = np.asarray(kps, float)
    vis = kps[:, 2] > 0
    if np.count_nonzero(vis) < 4:
        return None
    xy = kps[vis, :2]
    return (*xy.min(axis=0), *xy.max(axis=0))


def _following(p, adapter, frames, size, first_box, cancel, stop):
    """Yield (frame, result, error) along ``frames`` (one video, in order), each proposed from
    the box of the pose before it: the previous result, or a person's points where a frame holds
    them (those frames are proposed too; their points stay). ``stop`` gets the frame where the
    person was lost (no usable pose: score below 0.5 or fewer than 4 points), after which
    nothing more is proposed. ``size``: the video's (width, height)."""
    box = first_box
    for f in frames:
        if cancel.is_set():
            break
        try:
            img = p.read_frame(f.media_id, f.frame_index)
            res = predict_in_box(adapter, img, box_region(box, *size))
        except Exception as e:      # isolate, as in a batch; the chain cannot go on without a pose
            stop.append(f)
            yield f, None, str(e) if isinstance(e, KinemarkError) else f"{type(e).__name__}: {e}"
            break
        yield f, res, None
        ann = p.store.annotation(f.id)
        human = None if _is_untouched(ann) else _pose_box(ann.keypoints)
        nxt = human or (_pose_box(res.keypoints) if _usable(res) else None)
        if nxt is None:
            # stop at the first frame without a usable pose: carrying the last box on, or
            # following poses that score low, both did worse on the demo renders (see
            # follow_person)
            stop.append(f)
            break
        box = nxt


def follow_person(project, frame_id: int, *, box=None, adapter=None, corrector=None, progress=None,
                  cancel: threading.Event | None = None) -> tuple[Changes, PrefillReport]:
    """Propose the later sampled frames of ``frame_id``'s video again, following one person.

    Starts from ``box`` (x0, y0, x1, y1), or else from the box of the pose the frame holds now
    (a person's points, or the untouched pre-fill); each next frame is proposed from the box of
    the pose before it (:func:`predict_in_box`), so the model stays on that person when someone
    else shares the frame. A frame holding a person's work gets the new proposal but keeps its
    points, which then lead the chain. The chain stops at the first frame where the model finds
    no usable pose (said in the message: box the person there and follow again).

    Measured on the Quillon Bay demo renders (invented, one person per frame, so this measures
    what following costs, not what it gains beside a second person), following each of the 24
    clips from the truth box on its first sampled frame: mean OKS on the later frames 0.773 and
    0.771 on the two draws (frames after a stop keep the proposal they had), against 0.770 and
    0.771 for the model's own crops; the chain stopped before the clip's end in 10 and 8 of the
    24 clips. Going on past a frame without a usable pose did worse: with the last good box for
    up to 3 such frames, 0.760 / 0.762 (still 8 and 7 stops); following every pose whatever its
    score, 0.707 / 0.739.
    """
    from .pose import load_adapter
    t0 = time.perf_counter()
    store = project.store
    start = store.frame(frame_id)
    if box is None:
        ann = store.annotation(frame_id)
        prop = store.proposal(frame_id)
        box = (_pose_box(ann.keypoints) if ann is not None else None) or \
              (_pose_box(prop.keypoints) if prop is not None else None)
        if box is None:
            raise KinemarkError("this frame has no pose to follow (four or more points): place some, "
                                "or draw a box around the person")
    m = store.media(start.media_id)
    box_region(box, m.width, m.height)            # a bad box is refused before any work
    if adapter is None:
        adapter = load_adapter(project)
    if corrector is None:
        corrector = _project_corrector(project, adapter)
    later = sorted((f for f in store.frames(start.media_id) if f.frame_index > start.frame_index),
                   key=lambda f: f.frame_index)
    report = PrefillReport(adapter.model_id, adapter.model_hash, candidates=len(later))
    cancel = cancel or threading.Event()
    stop: list = []
    items = _following(project, adapter, later, (m.width, m.height), box, cancel, stop)
    proposal_ids, ann_ids = _store_all(project, adapter, items, len(later), corrector, report, progress)
    report.cancelled = cancel.is_set()
    report.seconds = time.perf_counter() - t0
    msg = f"followed the person through {report.proposed} of the {len(later)} later frame(s) of this video"
    if stop:
        msg += (f"; lost them at video frame {stop[-1].frame_index} (no confident pose there, or "
                f"the model failed): box the person there and follow again")
    msg += report.outcome()
    return (Changes(frames=tuple(f.id for f in later), proposals=tuple(proposal_ids),
                    annotations=tuple(ann_ids), message=msg), report)


def _region_dict(region):
    if region is None:
        return None
    return {"cx": region.cx, "cy": region.cy, "w": region.w, "h": region.h,
            "angle": region.angle, "source": region.source}
