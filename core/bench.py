"""``kinemark bench ...``: measured figures, printed. Benchmarks never assert.

The data here is invented for measuring only (random poses on fake media rows
that have no file behind them).
"""
from __future__ import annotations

import resource
import shutil
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np

from .errors import KinemarkError
from .model import ACCEPTED
from .skeleton import COCO17


def _rss_mb() -> float:
    # ru_maxrss is in kilobytes on Linux
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def _fake_project(root: Path, n_frames: int, n_accepted: int, seed: int = 0):
    from .project import Project
    rng = np.random.default_rng(seed)
    p = Project.create(root, COCO17, owner="bench")
    s = p.store
    per_media = 5000
    uid = p.user().id
    made = 0
    m = 0
    while made < n_frames:
        n = min(per_media, n_frames - made)
        media, _ = s.add_media(session_id=None, kind="video", path=f"fake/{m}.mp4", path_base="project",
                               sha256=f"{m:064x}", fps=30.0, frame_count=n, width=1920, height=1080,
                               frames=[], user_id=uid)
        s.bulk_insert_frames(media.id, ((i, i / 30.0, f"{made + i:064x}") for i in range(n)))
        made += n
        m += 1
    frame_ids = [f.id for f in s.frames()][:n_accepted]
    s.bulk_insert_annotations(
        ((fid, np.column_stack([rng.uniform(100, 1800, 17), rng.uniform(100, 1000, 17),
                                rng.choice([1, 2], 17)]), ACCEPTED) for fid in frame_ids), user_id=uid)
    p.close()


def bench_export(n: int = 10_000):
    from . import ops
    from .project import Project
    tmp = Path(tempfile.mkdtemp(prefix="kinemark-bench-"))
    try:
        _fake_project(tmp / "p", n, n)
        with Project.open(tmp / "p") as p:
            t0 = time.perf_counter()
            ops.export_coco(p, tmp / "out.json")
            dt = time.perf_counter() - t0
            # a second, separate run for memory: tracemalloc slows Python down several times
            tracemalloc.start()
            ops.export_coco(p, tmp / "out.json")
            _, peak = tracemalloc.get_traced_memory()
            tracemalloc.stop()
        size = (tmp / "out.json").stat().st_size / 1e6
        print(f"export: {n} accepted frames -> COCO JSON in {dt:.3f} s "
              f"(goal <= 2 s); file {size:.1f} MB; peak Python heap {peak / 1e6:.1f} MB; "
              f"process max RSS {_rss_mb():.0f} MB")
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


def bench_open(n: int = 100_000):
    from . import ops
    from .project import Project
    tmp = Path(tempfile.mkdtemp(prefix="kinemark-bench-"))
    try:
        _fake_project(tmp / "p", n, min(n, 2000))
        t0 = time.perf_counter()
        p = Project.open(tmp / "p")
        d = ops.info(p)
        dt = time.perf_counter() - t0
        t1 = time.perf_counter()
        frames = p.store.frames()
        dt_frames = time.perf_counter() - t1
        p.close()
        print(f"open: project with {d['frames']} frames opened and summarised in {dt:.3f} s "
              f"(goal <= 1 s); listing all frames {dt_frames:.3f} s ({len(frames)} records); "
              f"process max RSS {_rss_mb():.0f} MB")
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


def _names(text):
    """A comma-separated list of names, or None when not given."""
    return None if not text else tuple(x.strip() for x in str(text).split(",") if x.strip())


def run(what: str, args=None):
    for opt in ("frames", "seconds", "cases"):
        v = getattr(args, opt, None)
        if v is not None and not (np.isfinite(v) and v > 0):
            raise KinemarkError(f"--{opt} must be above 0, not {v}")
    n = getattr(args, "frames", None)
    if what in ("export", "all"):
        bench_export(n or 10_000)
    if what in ("open", "all"):
        bench_open(n or 100_000)
    if what in ("rank", "all"):
        bench_rank()
    if what in ("propose", "all"):
        bench_propose(n or 60)
    if what in ("queue", "all"):
        from .bench_queue import run as run_queue
        seeds = getattr(args, "tuning_seeds", None) or "0"
        try:
            tuning_seeds = tuple(int(x) for x in str(seeds).split(","))
        except ValueError:
            raise KinemarkError(f"--tuning-seeds must be whole numbers separated by commas, not {seeds!r}") from None
        run_queue(project_dir=getattr(args, "project", None) or "sample_project",
                  scenario_seed=getattr(args, "scenario_seed", None),
                  tuning=bool(getattr(args, "tuning", False)), tuning_seeds=tuning_seeds,
                  tuning_strategies=_names(getattr(args, "tuning_strategies", None)))
    if what in ("team", "all"):
        from .bench_team import run as run_team
        run_team(getattr(args, "db", None), seconds=getattr(args, "seconds", None) or 60.0)
    if what in ("crash", "all"):
        from .reliability import bench_crash
        bench_crash(getattr(args, "cases", None) or 50)
    if what in ("fuzz", "all"):
        from .reliability import bench_fuzz
        bench_fuzz(getattr(args, "cases", None) or 10_000)
    if what in ("gui", "all"):
        from ..app.bench_gui import run as run_gui   # the app's own benchmark (imports Qt)
        run_gui(args)


def bench_rank(sizes=(10_000, 30_000, 100_000), batch: int = 200, dim: int = 34, repeats: int = 3):
    """Selection cost on random pools (pose-feature sized vectors): should grow as frames x batch.

    Each size runs ``repeats`` times, sizes interleaved, so a busy moment on a shared machine
    shows as a spread instead of deciding the figure; the median is compared with the goal."""
    from .ranking import RankingQueue, RankWeights
    rng = np.random.default_rng(0)
    pools = []
    for n in sizes:
        pools.append((n, rng.normal(size=(n, dim)), rng.uniform(size=n), rng.integers(0, max(1, n // 300), n),
                      rng.integers(0, 9000, n), rng.normal(size=(100, dim))))
    times = {n: [] for n in sizes}
    for _ in range(repeats):
        for n, X, u, media, index, lab in pools:
            t0 = time.perf_counter()
            q = RankingQueue(X, u, media, index, RankWeights(), lab)
            q.select(batch)
            times[n].append(time.perf_counter() - t0)
    med = {}
    for n in sizes:
        ts = np.array(times[n])
        med[n] = float(np.median(ts))
        print(f"rank: {n:>7} candidates, 100 labelled, batch {batch}: median {med[n]:.3f} s of {repeats} "
              f"(range {ts.min():.3f}-{ts.max():.3f} s; {med[n] / (n * batch) * 1e9:.2f} ns per frame x pick)")
    if len(sizes) > 1:
        n0, n1 = sizes[0], sizes[-1]
        print(f"rank: median time ratio {n1}/{n0} = {med[n1] / med[n0]:.1f}x for {n1 / n0:.0f}x the frames "
              f"(linear would be {n1 / n0:.0f}x)")
    if 100_000 in med:
        print(f"rank: goal 100k x 200 in <= 2 s: median {med[100_000]:.2f} s, "
              f"{'met' if med[100_000] <= 2.0 else 'NOT met'}")


def bench_propose(n_frames: int = 60, repeats: int = 5):
    """Raw model rate vs the full pre-fill pipeline on the same crops, and peak memory.

    Frames come from the invented scenario renderer (rendered once into a
    temporary folder). The raw figure runs only ONNX inference on exactly the
    crops the pipeline used (whole-frame first pass, then the second-pass crop
    and its mirror as one batch of two); the pipeline figure is everything:
    decode, crop, both passes with flip, decoding, signals and storing.

    Two layouts of the machine's 2 cores are measured, each against inference
    alone in the same layout: one worker whose ONNX Runtime session has 2
    threads, and 2 workers (``--workers 2``) whose sessions have 1 thread each
    and run side by side (their raw figure replays each worker's crops on its
    own session, both at once). Sessions are loaded before timing in both.

    Each layout's pipeline and raw runs alternate, ``repeats`` times (a fresh
    project for every pipeline run, so nothing is skipped as already proposed);
    each pair's ratio is printed with the medians: this machine is shared and a
    single pair can be off by 20 %. The last line sets the faster pipeline
    against the faster inference-only layout.
    """
    import threading

    from . import ops
    from .media import Sampling
    from .pose import load_adapter
    from .prefill import prefill
    from .project import Project
    from .skeleton import COCO17
    from .synth import render_scenario
    tmp = Path(tempfile.mkdtemp(prefix="kinemark-bench-"))
    layouts = {"1 worker x 2 threads": (1, 2), "2 workers x 1 thread": (2, 1)}
    try:
        clips = render_scenario(tmp / "clips", seed=11, size="tiny")
        adapters: dict[str, list] = {}
        figures = {name: {"pipe": [], "raw": [], "ratio": []} for name in layouts}
        rss0 = None
        for rep in range(max(1, repeats)):
            for name, (workers, threads) in layouts.items():
                p = Project.create(tmp / f"p{rep}-{workers}", COCO17, owner="bench")
                ops.add_media(p, [c.mp4_path for c in clips], sampling=Sampling(every=1))
                fids = [f.id for f in p.store.frames()][:n_frames]
                if name not in adapters:
                    adapters[name] = [load_adapter(p, threads=threads) for _ in range(workers)]
                    # warm up ONNX Runtime and the decoder: the first runs allocate
                    first = p.store.frame(fids[0])
                    for a in adapters[name]:
                        for _ in range(3):
                            a.predict(p.read_frame(first.media_id, first.frame_index))
                pool = adapters[name]
                # record every batch of crops each worker hands to its model, to replay them alone
                recorded = [[] for _ in pool]
                real = [a.predict_raw for a in pool]
                for a, rec, raw in zip(pool, recorded, real):
                    def recording_raw(crops, rec=rec, raw=raw):
                        rec.append(np.array(crops, copy=True))
                        return raw(crops)
                    a.predict_raw = recording_raw
                handed = iter(pool)
                if rss0 is None:
                    rss0 = _rss_mb()
                t0 = time.perf_counter()
                if workers == 1:
                    _, rep_ = ops.propose(p, frame_ids=fids, adapter=pool[0])
                else:
                    _, rep_ = prefill(p, frame_ids=fids, make_adapter=lambda: next(handed), workers=workers)
                t_pipe = time.perf_counter() - t0
                for a, raw in zip(pool, real):
                    a.predict_raw = raw

                def replay(raw, batches):
                    for b in batches:
                        raw(b)
                t0 = time.perf_counter()
                if workers == 1:
                    replay(real[0], recorded[0])
                else:
                    ts = [threading.Thread(target=replay, args=(raw, rec)) for raw, rec in zip(real, recorded)]
                    for t in ts:
                        t.start()
                    for t in ts:
                        t.join()
                t_raw = time.perf_counter() - t0
                n_crops = sum(len(b) for rec in recorded for b in rec)
                n_calls = sum(len(rec) for rec in recorded)
                n = rep_.proposed
                p.close()
                f = figures[name]
                f["pipe"].append(n / t_pipe)
                f["raw"].append(n / t_raw)
                f["ratio"].append(t_raw / t_pipe)
                print(f"propose run {rep + 1}, {name}: {n} frames ({len(rep_.failed)} failed); full pipeline "
                      f"{t_pipe:.2f} s ({n / t_pipe:.1f} frames/s); inference only on the same {n_crops} crops "
                      f"({n_calls} model calls) {t_raw:.2f} s ({n / t_raw:.1f} frames/s); ratio {t_raw / t_pipe:.2f}")
        med = {name: {k: float(np.median(v)) for k, v in f.items()} for name, f in figures.items()}
        for name, f in figures.items():
            print(f"propose, {name}: median over {len(f['ratio'])} alternating runs: pipeline "
                  f"{med[name]['pipe']:.1f} frames/s, inference only {med[name]['raw']:.1f} frames/s; "
                  f"ratio {med[name]['ratio']:.2f} (range {min(f['ratio']):.2f}-{max(f['ratio']):.2f})")
        best_pipe = max(med, key=lambda k: med[k]["pipe"])
        best_raw = max(med, key=lambda k: med[k]["raw"])
        print(f"propose: fastest pipeline ({best_pipe}) {med[best_pipe]['pipe']:.1f} frames/s against fastest "
              f"inference only ({best_raw}) {med[best_raw]['raw']:.1f} frames/s: pipeline/raw rate ratio "
              f"{med[best_pipe]['pipe'] / med[best_raw]['raw']:.2f} (goal >= 0.8); peak RSS {_rss_mb():.0f} MB "
              f"(before the first run {rss0:.0f} MB; goal <= 1024 MB)")
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
