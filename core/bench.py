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


def run(what: str, args=None):
    n = getattr(args, "frames", None)
    if what in ("export", "all"):
        bench_export(n or 10_000)
    if what in ("open", "all"):
        bench_open(n or 100_000)
    if what in ("rank", "all"):
        bench_rank()


def bench_rank(sizes=(10_000, 30_000, 100_000), batch: int = 200, dim: int = 34):
    """Selection cost on random pools (pose-feature sized vectors): should grow as frames x batch."""
    from .ranking import RankingQueue, RankWeights
    rng = np.random.default_rng(0)
    rows = []
    for n in sizes:
        X = rng.normal(size=(n, dim))
        u = rng.uniform(size=n)
        media = rng.integers(0, max(1, n // 300), n)
        index = rng.integers(0, 9000, n)
        lab = rng.normal(size=(100, dim))
        t0 = time.perf_counter()
        q = RankingQueue(X, u, media, index, RankWeights(), lab)
        picks = q.select(batch)
        dt = time.perf_counter() - t0
        rows.append((n, dt, len(picks)))
        print(f"rank: {n:>7} candidates, batch {batch}: {dt:.3f} s "
              f"({dt / (n * batch) * 1e9:.2f} ns per frame x pick)")
    if len(rows) > 1:
        (n0, t0_, _), (n1, t1, _) = rows[0], rows[-1]
        print(f"rank: time ratio {rows[-1][0]}/{rows[0][0]} = {t1 / t0_:.1f}x for {n1 / n0:.0f}x the frames "
              f"(linear would be {n1 / n0:.0f}x); goal: 100k x 200 in <= 2 s")
