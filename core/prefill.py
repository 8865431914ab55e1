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
        s = (f"{self.model_id}: proposed {self.proposed} frame(s) in {self.seconds:.1f} s "
             f"({rate:.1f} frames/s); {self.already_done} already proposed by this model")
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


def _proposals(p, adapter, items, cancel, max_gap):
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
            res = adapter.predict(img, previous=hint)
            ok = res.score >= 0.5 and np.count_nonzero(res.keypoints[:, 2] > 0) >= 4
            prev_media, prev_index, prev_kps = f.media_id, f.frame_index, (res.keypoints if ok else None)
            yield f, res, None
        except Exception as e:  # isolate: one bad frame never stops the batch
            msg = str(e) if isinstance(e, KinemarkError) else f"{type(e).__name__}: {e}"
            prev_kps = None
            yield f, None, msg


def _worker(root, make_adapter, items, out_q, cancel, max_gap):
    from .project import Project
    try:
        adapter = make_adapter()
        with Project.open(root) as p:
            for item in _proposals(p, adapter, items, cancel, max_gap):
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
            max_gap: int = 2, corrector=None) -> tuple[Changes, PrefillReport]:
    """Propose keypoints for many frames and pre-fill their labels.

    ``adapter``: an already loaded model (used by a single worker); or
    ``make_adapter``: a factory called once per worker thread (each worker
    gets its own ONNX Runtime session and its own project connection for
    reading frames). Default: the project's model (:func:`pose.load_adapter`).
    ``max_gap``: a proposal on a frame at most this many video frames before
    the next sampled one seeds that frame's crop (the neighbouring-pose crop).
    ``corrector``: optional per-project correction (``adapt``) applied before
    pre-filling; the raw proposal is stored either way.
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
        from .adapt import Corrector, load_correction
        corr = load_correction(project, adapter.model_hash)
        corrector = Corrector(corr) if corr is not None else None
    cand = candidate_frames(project, frames)
    if frame_ids is not None:
        wanted = set(frame_ids)
        cand = [f for f in cand if f.id in wanted]
    report.candidates = len(cand)
    done = project.store.proposed_frame_ids(adapter.model_hash)
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
        items = _proposals(project, adapter, shards[0], cancel, max_gap)
    else:
        out_q: queue.Queue = queue.Queue(maxsize=64)
        for n, shard in enumerate(shards):
            mk = (lambda a=adapter: a) if n == 0 else make_adapter
            t = threading.Thread(target=_worker, args=(project.root, mk, shard, out_q, cancel, max_gap),
                                 daemon=True)
            t.start()
            threads.append(t)
        items = _from_workers(threads, out_q)

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
                        score=res.score, region=_region_dict(res.region), embedding=res.embedding)
                    proposal_ids.append(pid)
                    ann = store.annotation(f.id)
                    if _is_untouched(ann):
                        kps, sources = res.keypoints, ["model"] * len(res.keypoints)
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
            progress(n_done, len(todo), f"proposing ({len(report.failed)} failed)")
    for t in threads:
        t.join()
    report.cancelled = cancel.is_set()
    report.seconds = time.perf_counter() - t0
    return (Changes(proposals=tuple(proposal_ids), annotations=tuple(ann_ids), message=report.summary()),
            report)


def _region_dict(region):
    if region is None:
        return None
    return {"cx": region.cx, "cy": region.cy, "w": region.w, "h": region.h,
            "angle": region.angle, "source": region.source}
