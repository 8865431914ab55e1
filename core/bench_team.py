"""``kinemark bench team``: several annotators at once on one PostgreSQL project.

Processes act as research assistants (claim a batch from the queue, label
each frame with a compare-and-set save, submit it, give the lease back) and
reviewers (accept submitted frames that are not their own). Afterwards the
logs are checked against the database:

* double claims: one frame held by two people over overlapping time;
* lost updates: a save a worker was told succeeded whose version and
  keypoints are not in the event log, or a final version lower than an
  acknowledged one;
* conflicts: saves or transitions refused because someone else got there
  first (these are correct refusals, reported, not errors).

Invented data: fake media rows with no files behind them. Prints figures,
asserts nothing.
"""
from __future__ import annotations

import hashlib
import json
import multiprocessing as mp
import os
import shutil
import tempfile
import time
import uuid
from pathlib import Path

import numpy as np


def _digest(kps) -> str:
    a = np.asarray(kps, float)
    return hashlib.sha256(json.dumps([[round(float(x), 3), round(float(y), 3), int(v)]
                                      for x, y, v in a]).encode()).hexdigest()[:16]


def _annotator(root, name, seconds, seed, out_q):
    from . import ops, review
    from .errors import KinemarkError
    from .project import Project
    rng = np.random.default_rng(seed)
    log = {"claims": [], "saves": [], "conflicts": 0, "submits": 0, "errors": []}
    end = time.time() + seconds
    with Project.open(root) as p:
        K = p.skeleton.num_keypoints
        while time.time() < end:
            try:
                _, new, renewed = ops.claim_batch(p, 4, lease_minutes=5, user=name)
            except KinemarkError as e:
                log["errors"].append(str(e))
                continue
            t_claim = time.time()
            held = new + renewed
            if not held:
                time.sleep(0.05)
                continue
            for fid in held:
                for _ in range(2):      # a first placement and one correction
                    a = p.store.annotation(fid)
                    kps = np.column_stack([rng.uniform(20, 600, K), rng.uniform(20, 450, K), np.full(K, 2.0)])
                    try:
                        ch = review.edit(p, fid, kps, ["human"] * K, user=name,
                                         expected_version=a.version if a else 0)
                        log["saves"].append((fid, ch.details["version"], _digest(kps)))
                    except KinemarkError:
                        log["conflicts"] += 1
                a = p.store.annotation(fid)
                if a is not None and a.state == "drafting":
                    try:
                        review.submit(p, a.id, user=name)
                        log["submits"] += 1
                    except KinemarkError:
                        log["conflicts"] += 1
            p.store.release_claims(p.user(name).id, held)
            log["claims"].extend((fid, t_claim, time.time()) for fid in held)
    out_q.put((name, log))


def _reviewer(root, name, seconds, out_q):
    from . import review
    from .errors import KinemarkError
    from .model import IN_REVIEW
    from .project import Project
    log = {"accepts": 0, "conflicts": 0}
    end = time.time() + seconds
    with Project.open(root) as p:
        while time.time() < end:
            waiting = p.store.annotations([IN_REVIEW])
            if not waiting:
                time.sleep(0.05)
                continue
            for a in waiting[:5]:
                try:
                    review.accept(p, a.id, user=name)
                    log["accepts"] += 1
                except KinemarkError:
                    log["conflicts"] += 1
    out_q.put((name, log))


def run(dsn: str | None = None, *, seconds: float = 60.0, annotators: int = 6, reviewers: int = 2,
        frames: int = 3000, say=print):
    from .project import Project
    from .skeleton import COCO17
    from .store import drop_postgres_project
    dsn = dsn or os.environ.get("KINEMARK_TEST_PG")
    if not dsn:
        say("bench team: needs a PostgreSQL server: pass --db or set KINEMARK_TEST_PG "
            "(bash .ci/postgres.sh starts one on loopback)")
        return None
    schema = "bench_" + uuid.uuid4().hex[:10]
    tmp = Path(tempfile.mkdtemp(prefix="kinemark-team-"))
    root = tmp / "team"
    try:
        p = Project.create(root, COCO17, owner="lead", db=dsn, schema=schema)
        names = [f"ra{i}" for i in range(annotators)]
        revs = [f"rev{i}" for i in range(reviewers)]
        for n in names:
            p.store.add_user(n, "annotator")
        for n in revs:
            p.store.add_user(n, "reviewer")
        media, _ = p.store.add_media(session_id=None, kind="video", path="fake/ward.mp4", path_base="project",
                                     sha256="f" * 64, fps=30.0, frame_count=frames, width=640, height=480,
                                     frames=[])
        p.store.bulk_insert_frames(media.id, ((i, i / 30.0, f"{i:064x}") for i in range(frames)))
        p.close()
        ctx = mp.get_context("spawn")
        q = ctx.Queue()
        procs = [ctx.Process(target=_annotator, args=(str(root), n, seconds, i, q)) for i, n in enumerate(names)]
        procs += [ctx.Process(target=_reviewer, args=(str(root), n, seconds, q)) for n in revs]
        t0 = time.time()
        for pr in procs:
            pr.start()
        logs = dict(q.get() for _ in procs)
        for pr in procs:
            pr.join()
        wall = time.time() - t0
        with Project.open(root) as p:
            events = p.store.events(entity="annotation")
            seen = set()
            for e in events:
                if e.after:
                    a = json.loads(e.after)
                    if "keypoints" in a:
                        seen.add((e.entity_id, a["version"], _digest(a["keypoints"])))
            ann_of = {a.frame_id: a for a in p.store.annotations()}
            lost = 0
            saves = 0
            for n in names:
                for fid, version, dig in logs[n]["saves"]:
                    saves += 1
                    a = ann_of.get(fid)
                    if a is None or a.version < version or (a.id, version, dig) not in seen:
                        lost += 1
            intervals: dict = {}
            for n in names:
                for fid, t_a, t_b in logs[n]["claims"]:
                    intervals.setdefault(fid, []).append((t_a, t_b, n))
            double = 0
            for fid, iv in intervals.items():
                iv.sort()
                for (a0, a1, u), (b0, b1, v) in zip(iv, iv[1:]):
                    if u != v and b0 < a1:
                        double += 1
            accepted = p.store.state_counts()["accepted"]
        conflicts = sum(logs[n]["conflicts"] for n in names + revs)
        submits = sum(logs[n]["submits"] for n in names)
        accepts = sum(logs[n]["accepts"] for n in revs)
        ops_done = saves + submits + accepts
        say(f"team: {annotators} annotator + {reviewers} reviewer processes on PostgreSQL for {wall:.0f} s")
        say(f"team: {saves} saves, {submits} submits, {accepts} accepts ({accepted} frames accepted): "
            f"{ops_done / wall:.1f} operations/s")
        say(f"team: double claims {double} (goal 0); lost updates {lost} (goal 0); conflicts reported "
            f"{conflicts} (refusals naming who got there first; correct behaviour)")
        return {"double": double, "lost": lost, "conflicts": conflicts, "rate": ops_done / wall}
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
        drop_postgres_project(dsn, schema)
