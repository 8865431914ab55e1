"""Reliability under crashes and bad input: the project's invariants, a crash harness, fuzzers.

Three things live here (no Qt, no SQL: every read goes through :class:`~.store.Store`):

* :func:`check_invariants` - what must hold in any project, whatever happened to the
  process that wrote it: keypoint shapes and COCO visibilities, versions that match the
  event log row for row, an event log without holes, no annotation without its event.
* The crash harness (``kinemark bench crash``): a child process labels a small project
  through the core API (:func:`kinemark.core.review.edit` and the review transitions)
  and acknowledges every committed change on stdout; the parent kills it with SIGKILL
  at seeded random moments, then reopens the project and checks SQLite's own
  ``PRAGMA integrity_check``, the invariants, and that every acknowledged change is
  there. The store runs SQLite in WAL mode with ``synchronous=NORMAL``: SQLite
  documents that a committed transaction survives an application crash in that mode,
  and may be rolled back after a power failure or an operating-system crash. The
  harness kills processes; it says nothing about power loss.
* Fuzzers (``kinemark bench fuzz``): hypothesis-generated COCO files through
  :func:`kinemark.core.ops.import_coco` under both policies, and corrupt, truncated or
  oddly placed media files through :func:`kinemark.core.ops.add_media`. Per case they
  count crashes (an exception other than :class:`KinemarkError`), partial writes (the
  project changed although the call raised, or a ``refuse`` import wrote from a file
  that an independent check of the COCO rules finds defective), and paths that leave
  their folder.

hypothesis is a test extra, imported only when a fuzzer runs.
"""
from __future__ import annotations

import hashlib
import json
import os
import random
import re
import shutil
import signal
import subprocess
import sys
import tempfile
import threading
import time
import traceback
from collections import defaultdict
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .errors import KinemarkError
from .model import SOURCES, STATES

# ---- invariants -------------------------------------------------------------------------------


def _loads(text):
    return json.loads(text) if text else None


def _versioned(after) -> bool:
    return isinstance(after, dict) and isinstance(after.get("version"), int)


def check_invariants(project) -> list[str]:
    """What must hold in every project, as a list of problems (empty when all hold).

    * every annotation has the skeleton's number of keypoints (x, y, v) and of sources,
      visibilities in {0, 1, 2} (COCO keypoint format), finite coordinates, (0, 0) for
      v = 0 points (COCO stores unlabelled points as zeros), a known state and source,
      and a frame that exists;
    * the event log's ids rise strictly, and on SQLite by exactly one from row to row: the
      log is append-only and SQLite gives a new row max(id) + 1, so a hole means a row was
      removed;
    * every annotation has its event rows: since its last deletion (an event whose
      ``after`` is empty), the events that record a version carry 1, 2, ..., n in log
      order, the first one creates it, n is the stored version, the last one's state is
      the stored state, and the last one that records keypoints holds the stored ones
      (each edit writes its event in its own transaction);
    * the same for agreement (second) labels: their event count and versions match.

    Projects filled by ``Store.bulk_insert_annotations`` (benchmarks only, no event rows)
    fail the event checks by design.
    """
    s = project.store
    problems: list[str] = []
    P = problems.append
    try:
        _, skel = s.skeleton()
        K = skel.num_keypoints
        events = s.events()
        anns = s.annotations()
        frame_ids = {f.id for f in s.frames()}
        seconds = s.second_labels()
    except Exception as e:  # a project that cannot even be read is the worst violation
        return [f"the project cannot be read: {type(e).__name__}: {e}"]

    # the event log. SQLite gives a new row max(id) + 1, so there a hole means a removed row;
    # PostgreSQL identity sequences skip the values of rolled-back inserts, so there only order counts.
    contiguous = getattr(s, "dialect", "sqlite") == "sqlite"
    prev = None
    parsed = {}
    for ev in events:
        if prev is not None and ev.id <= prev:
            P(f"event ids are not strictly increasing: {ev.id} after {prev}")
        elif contiguous and prev is not None and ev.id != prev + 1:
            P(f"event ids jump from {prev} to {ev.id}: rows are missing from the append-only log")
        prev = ev.id
        try:
            parsed[ev.id] = (_loads(ev.before), _loads(ev.after))
        except ValueError as e:
            P(f"event {ev.id} holds text that is not JSON ({e})")
            parsed[ev.id] = (None, None)
    by_entity: dict = defaultdict(list)
    for ev in events:
        by_entity[(ev.entity, ev.entity_id)].append(ev)

    # annotations
    for a in anns:
        where = f"annotation {a.id} (frame {a.frame_id}, person {a.person})"
        k = np.asarray(a.keypoints, dtype=float)
        if k.shape != (K, 3):
            P(f"{where}: keypoints have shape {k.shape}, the skeleton needs ({K}, 3)")
        else:
            v = k[:, 2]
            if not np.all(np.isin(v, (0, 1, 2))):
                P(f"{where}: visibility values {sorted(set(v.tolist()) - {0, 1, 2})} are not COCO's 0, 1, 2")
            if not np.all(np.isfinite(k[:, :2])):
                P(f"{where}: a coordinate is not a finite number")
            elif np.any(k[v == 0, :2] != 0):
                P(f"{where}: an unlabelled (v=0) point carries a position")
        if len(a.sources) != K or any(src not in SOURCES for src in a.sources):
            P(f"{where}: sources {a.sources!r} are not one known source per keypoint")
        if a.state not in STATES:
            P(f"{where}: unknown state {a.state!r}")
        if a.frame_id not in frame_ids:
            P(f"{where}: its frame does not exist")
        if not (isinstance(a.version, int) and a.version >= 1):
            P(f"{where}: version {a.version!r} is not a whole number >= 1")
        evs = by_entity.get(("annotation", a.id), [])
        life = []
        for ev in evs:
            if ev.after is None and ev.action != "state":
                life = []          # deleted here; SQLite may give the id to a new annotation
            else:
                life.append(ev)
        vers = [ev for ev in life if _versioned(parsed[ev.id][1])]
        if not vers:
            P(f"{where}: has no event row (every change is logged in its own transaction)")
            continue
        got = [parsed[ev.id][1]["version"] for ev in vers]
        if got != list(range(1, len(got) + 1)):
            P(f"{where}: its events record versions {got[:8]}{'...' if len(got) > 8 else ''}, "
              f"not 1, 2, ... in order")
        if got[-1] != a.version or len(got) != a.version:
            P(f"{where}: stored version {a.version} but {len(got)} versioned event(s), the last at "
              f"version {got[-1]}")
        if parsed[vers[0].id][0] is not None:
            P(f"{where}: its first event (id {vers[0].id}) does not create it")
        last_after = parsed[vers[-1].id][1]
        if "state" in last_after and last_after["state"] != a.state:
            P(f"{where}: stored state {a.state} but its last event says {last_after['state']}")
        kp_events = [ev for ev in vers if "keypoints" in parsed[ev.id][1]]
        if kp_events and k.shape == (K, 3):
            logged = np.asarray(parsed[kp_events[-1].id][1]["keypoints"], dtype=float)
            if logged.shape != k.shape or not np.array_equal(logged, k):
                P(f"{where}: stored keypoints differ from those its last edit event (id "
                  f"{kp_events[-1].id}) recorded")

    # agreement labels
    for sl in seconds:
        where = f"agreement label {sl.id} (frame {sl.frame_id})"
        evs = [ev for ev in by_entity.get(("second_label", sl.id), []) if _versioned(parsed[ev.id][1])]
        got = [parsed[ev.id][1]["version"] for ev in evs]
        if got != list(range(1, sl.version + 1)):
            P(f"{where}: stored version {sl.version} but its events record versions {got[:8]}")
        sk = np.asarray(sl.keypoints, dtype=float)
        if sk.shape != (K, 3) or not np.all(np.isin(sk[:, 2], (0, 1, 2))):
            P(f"{where}: keypoints of shape {sk.shape} or visibilities outside 0, 1, 2")
    return problems


# ---- the crash harness ------------------------------------------------------------------------

ANNOTATOR, REVIEWER, ADMIN = "qb_ra_noor", "qb_rev_tamsin", "qb_admin"


def kp_checksum(kps) -> str:
    """A short digest of (K, 3) keypoints, with unlabelled points as COCO's (0, 0, 0)."""
    a = np.array(kps, dtype=float).reshape(-1, 3)
    a[a[:, 2] == 0, :2] = 0.0
    text = json.dumps([[float(x), float(y), int(v)] for x, y, v in a])
    return hashlib.sha256(text.encode("ascii")).hexdigest()[:16]


def build_crash_project(root, *, n_frames: int = 24, seed: int = 0):
    """A small project for the crash harness: one OpenCV-written clip of the invented Quillon
    Bay clinic (noise and a moving bar, each frame different), one participant, an admin,
    an annotator and a reviewer. Returns the project folder."""
    import cv2

    from . import ops, review
    from .media import Sampling
    from .project import Project
    from .skeleton import COCO17
    root = Path(root)
    media = root / "media"
    media.mkdir(parents=True, exist_ok=True)
    w, h = 160, 120
    rng = np.random.default_rng(seed)
    base = rng.integers(0, 255, (h, w, 3), dtype=np.uint8)
    clip = media / "qb07_sit_to_stand.mp4"
    vw = cv2.VideoWriter(str(clip), cv2.VideoWriter_fourcc(*"mp4v"), 10.0, (w, h))
    paths = [clip]
    if vw.isOpened():
        for i in range(n_frames):
            img = (base // 2).copy()
            x = (i * 7) % (w - 10)
            img[:, x:x + 10] = (255, 255 - 5 * (i % 50), 40)
            vw.write(img)
        vw.release()
    else:       # no video encoder here: images do as well for labelling
        vw.release()
        paths = []
        for i in range(n_frames):
            p = media / f"qb07_{i:03d}.png"
            cv2.imwrite(str(p), np.roll(base, i, axis=1))
            paths.append(p)
    proj_dir = root / "project"
    p = Project.create(proj_dir, COCO17, owner=ADMIN)
    try:
        review.add_member(p, ANNOTATOR, "annotator", by=ADMIN)
        review.add_member(p, REVIEWER, "reviewer", by=ADMIN)
        ops.add_media(p, paths, participant="QB-07", sampling=Sampling(every=1), user=ADMIN)
    finally:
        p.close()
    return proj_dir


def _random_pose(rng, w, h, K=17) -> np.ndarray:
    k = np.column_stack([np.round(rng.uniform(0, w, K), 2), np.round(rng.uniform(0, h, K), 2),
                         rng.choice([0, 1, 2, 2, 2], K)]).astype(float)
    k[k[:, 2] == 0, :2] = 0.0
    return k


def child_main(root, seed: int, max_ops: int = 10 ** 9):
    """Label the project in a loop and print ``ACK ...`` after every committed change.

    Line format: ``ACK <kind> <frame id> <annotation id> <version> <state> <checksum> END``;
    ``kind`` is ``edit`` (keypoints saved), or the review transition's name.
    """
    from . import review
    from .model import ACCEPTED, DRAFTING, IN_REVIEW, PREFILLED, RETURNED
    from .project import Project
    rng = np.random.default_rng(seed)
    p = Project.open(root)
    out = sys.stdout
    try:
        fids = [f.id for f in p.store.frames()]
        m = p.store.all_media()[0]
        K = p.skeleton.num_keypoints
        out.write("READY\n")
        out.flush()
        for _ in range(max_ops):
            if rng.random() < 0.02:      # now and then close and reopen (a WAL checkpoint on close)
                p.close()
                p = Project.open(root)
            fid = int(rng.choice(fids))
            a = p.store.annotation(fid)
            state = a.state if a else "blank"
            r = rng.random()
            kind = "edit"
            if state in ("blank", PREFILLED) or (state == DRAFTING and r < 0.6) or (state == RETURNED and r < 0.5):
                who = ANNOTATOR
            elif state == DRAFTING:
                kind, who = "submit", ANNOTATOR
            elif state == RETURNED:
                kind, who = "resume", ANNOTATOR
            elif state == IN_REVIEW:
                kind, who = (("accept", REVIEWER) if r < 0.45 else ("recall", ANNOTATOR) if r < 0.75
                             else ("edit", REVIEWER))
            elif state == ACCEPTED:
                kind, who = "reopen", REVIEWER
            else:
                raise RuntimeError(f"unexpected state {state!r}")
            if kind == "edit":
                kps = _random_pose(rng, m.width, m.height, K)
                ch = review.edit(p, fid, kps, ["human"] * K, user=who)
                sum_ = kp_checksum(kps)
            else:
                note = "check the left wrist against the reach target" if kind == "reopen" else None
                ch = review.apply(p, a.id, kind, user=who, note=note)
                sum_ = kp_checksum(a.keypoints)
            out.write(f"ACK {kind} {fid} {ch.annotations[0]} {ch.details['version']} "
                      f"{ch.details['state']} {sum_} END\n")
            out.flush()
    finally:
        p.close()


@dataclass(frozen=True)
class Ack:
    kind: str
    frame_id: int
    annotation_id: int
    version: int
    state: str
    checksum: str


_ACK = re.compile(r"^ACK (\w+) (\d+) (\d+) (\d+) (\w+) ([0-9a-f]{16}) END\n$")


def parse_ack(line: str) -> Ack | None:
    """An acknowledgement from a complete line (a line cut short by the kill is not one)."""
    m = _ACK.match(line)
    if not m:
        return None
    return Ack(m[1], int(m[2]), int(m[3]), int(m[4]), m[5], m[6])


def verify_acks(project, acks) -> list[str]:
    """Every acknowledged change must be in the project: the annotation is at that version
    or a newer one, the event row of that version is in the log with the acknowledged state
    (and, for an edit, the acknowledged keypoints), and if the stored version is the
    acknowledged one, the stored state and keypoints are the acknowledged ones."""
    s = project.store
    lost = []
    acks = list(acks)
    ids = sorted({a.annotation_id for a in acks})
    evs: dict = defaultdict(dict)
    for ev in s.events_for("annotation", ids):
        after = _loads(ev.after)
        if _versioned(after):
            evs[ev.entity_id][after["version"]] = after
    current = {}
    for a in s.annotations():
        current[a.id] = a
    for ack in acks:
        what = f"{ack.kind} of annotation {ack.annotation_id} (frame {ack.frame_id}) at version {ack.version}"
        row = current.get(ack.annotation_id)
        if row is None:
            lost.append(f"{what}: the annotation is gone"); continue
        if row.frame_id != ack.frame_id:
            lost.append(f"{what}: the annotation now sits on frame {row.frame_id}"); continue
        if row.version < ack.version:
            lost.append(f"{what}: the project holds version {row.version}"); continue
        logged = evs.get(ack.annotation_id, {}).get(ack.version)
        if logged is None:
            lost.append(f"{what}: its event row is missing"); continue
        if logged.get("state") != ack.state:
            lost.append(f"{what}: its event says state {logged.get('state')}, acknowledged {ack.state}")
            continue
        if ack.kind == "edit" and kp_checksum(logged["keypoints"]) != ack.checksum:
            lost.append(f"{what}: its event holds other keypoints than acknowledged"); continue
        if row.version == ack.version and (row.state != ack.state or kp_checksum(row.keypoints) != ack.checksum):
            lost.append(f"{what}: the stored state or keypoints differ from the acknowledged ones")
    return lost


@dataclass
class CrashReport:
    kills: int = 0
    early_kills: int = 0            # killed while starting up, before its first edit
    acks: int = 0
    by_kind: dict = field(default_factory=dict)
    lost: list = field(default_factory=list)
    violations: list = field(default_factory=list)
    integrity: list = field(default_factory=list)     # integrity_check results other than ok
    child_errors: list = field(default_factory=list)  # the child died of something else
    seconds: float = 0.0
    labelling_seconds: float = 0.0  # time the children spent labelling before their kill


def crash_run(kills: int = 50, *, seed: int = 0, workdir=None, max_run: float = 1.0,
              early_share: float = 0.1, progress=None) -> CrashReport:
    """Build a project, then ``kills`` times: start a labelling child, SIGKILL it at a seeded
    random moment (a share ``early_share`` of the kills land during its start-up, the rest
    up to ``max_run`` seconds into labelling), reopen and check the project."""
    from .project import Project
    rep = CrashReport()
    t0 = time.perf_counter()
    own = workdir is None
    work = Path(tempfile.mkdtemp(prefix="kinemark-crash-")) if own else Path(workdir)
    rng = random.Random(seed)
    try:
        root = build_crash_project(work / "crash", seed=seed)
        acks: list[Ack] = []
        env = dict(os.environ)
        for k in range(kills):
            err_path = work / f"child-{k}.err"
            with open(err_path, "wb") as err:
                child = subprocess.Popen(
                    [sys.executable, "-m", "kinemark.core.reliability", "child", str(root),
                     "--seed", str(seed * 100_003 + k)],
                    stdout=subprocess.PIPE, stderr=err, env=env)
            lines: list[bytes] = []
            ready = threading.Event()

            def read(pipe=child.stdout, lines=lines, ready=ready):
                for line in iter(pipe.readline, b""):
                    lines.append(line)
                    if line == b"READY\n":
                        ready.set()
                ready.set()
            reader = threading.Thread(target=read, daemon=True)
            reader.start()
            early = rng.random() < early_share
            if early:
                time.sleep(rng.uniform(0.0, 0.4))
                t_lab = 0.0
            else:
                if not ready.wait(60):
                    rep.child_errors.append(f"round {k}: the child did not start within 60 s")
                t_start = time.perf_counter()
                time.sleep(rng.uniform(0.0, max_run))
                t_lab = time.perf_counter() - t_start
            exited = child.poll()
            if exited is None:
                os.kill(child.pid, signal.SIGKILL)
            child.wait()
            reader.join(10)
            child.stdout.close()
            rep.kills += exited is None
            if exited is not None:
                tail = err_path.read_text(errors="replace")[-800:]
                rep.child_errors.append(f"round {k}: the child exited by itself (code {exited}): {tail}")
            got_ready = any(line == b"READY\n" for line in lines)
            rep.early_kills += not got_ready
            rep.labelling_seconds += t_lab if got_ready else 0.0
            for line in lines:
                a = parse_ack(line.decode("ascii", "replace"))
                if a is not None:
                    acks.append(a)
                    rep.by_kind[a.kind] = rep.by_kind.get(a.kind, 0) + 1
            # the checks, on the project as the kill left it
            try:
                p = Project.open(root)
            except Exception as e:
                rep.violations.append(f"round {k}: the project does not open: {type(e).__name__}: {e}")
                break
            try:
                ic = p.store.integrity_check()
                if ic != "ok":
                    rep.integrity.append(f"round {k}: {ic}")
                rep.violations.extend(f"round {k}: {v}" for v in check_invariants(p))
                lost = verify_acks(p, acks)
                rep.lost = lost        # cumulative: every ack so far, checked again
            finally:
                p.close()
            if progress:
                progress(k + 1, kills, f"{len(acks)} acknowledged, {len(rep.lost)} lost")
        rep.acks = len(acks)
    finally:
        rep.seconds = time.perf_counter() - t0
        if own:
            shutil.rmtree(work, ignore_errors=True)
    return rep


def bench_crash(kills: int = 50, seed: int = 0):
    rep = crash_run(kills, seed=seed)
    kinds = ", ".join(f"{k} {n}" for k, n in sorted(rep.by_kind.items()))
    rate = rep.acks / rep.labelling_seconds if rep.labelling_seconds else float("nan")
    print(f"crash: {rep.kills} SIGKILLs of a labelling child at seeded random moments (seed {seed}; "
          f"{rep.early_kills} during start-up) in {rep.seconds:.1f} s")
    print(f"crash: changes acknowledged {rep.acks} ({kinds}); the children labelled at "
          f"{rate:.0f} committed changes/s")
    print(f"crash: acknowledged changes lost {len(rep.lost)} (goal 0); invariant violations "
          f"{len(rep.violations)} (goal 0); integrity_check not ok {len(rep.integrity)} of {rep.kills} "
          f"reopenings (goal 0); children that died otherwise {len(rep.child_errors)} (goal 0)")
    for msg in (rep.lost[:5] + rep.violations[:5] + rep.integrity[:5] + rep.child_errors[:3]):
        print(f"crash:   {msg}")
    print("crash: SQLite runs in WAL mode with synchronous=NORMAL here. That keeps committed "
          "transactions through a killed process (this benchmark); after a power cut or an OS "
          "crash the last transactions may roll back, which this benchmark does not test.")


# ---- digests for partial-write checks ----------------------------------------------------------

def project_counts(project) -> dict:
    s = project.store
    return {"media": len(s.all_media()), "frames": s.frame_count(), "annotations": len(s.annotations()),
            "events": len(s.events()), "participants": len(s.participants()), "users": len(s.users())}


def project_digest(project) -> str:
    """A digest of what the project holds, through the store's own reads."""
    s = project.store
    h = hashlib.sha256()
    for rec in (s.all_media(), s.frames(), s.events(), s.participants(), s.users(), s.review_notes(),
                s.agreement_frame_ids()):
        h.update(repr(rec).encode())
    for a in s.annotations():
        h.update(repr((a.id, a.frame_id, a.person, a.sources, a.state, a.version, a.bbox,
                       a.updated_by, a.updated_at)).encode())
        h.update(np.ascontiguousarray(a.keypoints, dtype=float).tobytes())
    for sl in s.second_labels():
        h.update(repr((sl.id, sl.frame_id, sl.version)).encode())
        h.update(np.ascontiguousarray(sl.keypoints, dtype=float).tobytes())
    h.update(repr([(p.id, p.frame_id, p.model_hash) for p in s.proposals()]).encode())
    return h.hexdigest()


# ---- the fuzz world: a project to reset, an image folder, files outside it --------------------

GOOD_IMAGES = {"a.png": (64, 48), "b.jpg": (80, 60), "sub/c.png": (32, 24)}


class FuzzWorld:
    """One worker's scratch: an image folder (good, corrupt, truncated, empty, a folder named
    like an image, symbolic links out), an ``outside`` folder with a real image that no
    import may reach, and a project reset from a pristine copy whenever a case changed it."""

    def __init__(self, base):
        import cv2

        from .project import Project
        from .skeleton import COCO17
        self.base = Path(base)
        self.images = self.base / "images"
        self.outside = self.base / "outside"
        self.scratch = self.base / "scratch"
        for d in (self.images / "sub", self.outside, self.scratch):
            d.mkdir(parents=True, exist_ok=True)
        rng = np.random.default_rng(7)
        for rel, (w, h) in GOOD_IMAGES.items():
            assert cv2.imwrite(str(self.images / rel), rng.integers(0, 255, (h, w, 3), dtype=np.uint8))
        self.secret = self.outside / "secret.png"
        cv2.imwrite(str(self.secret), rng.integers(0, 255, (30, 40, 3), dtype=np.uint8))
        good = (self.images / "a.png").read_bytes()
        (self.images / "bad.png").write_bytes(bytes(rng.integers(0, 256, 300, dtype=np.uint8)))
        (self.images / "trunc.png").write_bytes(good[: len(good) // 3])
        (self.images / "empty.png").write_bytes(b"")
        (self.images / "dir.png").mkdir(exist_ok=True)
        for name, target in (("link_out.png", self.secret), ("linkdir", self.outside),
                             ("dangling.png", self.outside / "nope.png")):
            link = self.images / name
            if not link.is_symlink():
                os.symlink(target, link)
        self.file_names = (
            list(GOOD_IMAGES) + ["./a.png", "sub//c.png", "a.png/", "bad.png", "trunc.png", "empty.png",
                                 "dir.png", "missing.png", "link_out.png", "linkdir/secret.png",
                                 "dangling.png", "../outside/secret.png", "../../x.png", "sub/../a.png",
                                 "..\\outside\\secret.png", "C:\\images\\a.png", "C:a.png",
                                 "\\\\clinic-share\\images\\a.png", "\\a.png", "a.png\x00.txt", "", " ",
                                 str(self.secret), str(self.images / "a.png"), "/etc/passwd", "~/a.png",
                                 "%2e%2e/outside/secret.png", "sub/./c.png"])
        self.template = self.base / "template"
        p = Project.create(self.template, COCO17, owner="fuzz")
        p.close()
        self.proj_dir = self.base / "proj"
        self.project = None
        self.resets = 0
        self._copy()

    def _copy(self):
        from .project import Project
        from .store import DB_NAME
        if self.project is not None:
            self.project.close()
        self.proj_dir.mkdir(exist_ok=True)
        for suffix in ("", "-wal", "-shm", "-journal"):
            q = self.proj_dir / (DB_NAME + suffix)
            if q.exists():
                q.unlink()
        shutil.copy2(self.template / DB_NAME, self.proj_dir / DB_NAME)
        self.project = Project.open(self.proj_dir)
        self.baseline = project_digest(self.project)

    def reset(self):
        self.resets += 1
        self._copy()

    def close(self):
        if self.project is not None:
            self.project.close()
            self.project = None


@dataclass
class FuzzReport:
    what: str
    cases: int = 0
    calls: int = 0
    crashes: list = field(default_factory=list)        # (summary, case text)
    partial: list = field(default_factory=list)
    escapes: list = field(default_factory=list)
    violations: list = field(default_factory=list)
    unreadable: list = field(default_factory=list)     # accepted media whose frame did not read back
    outcomes: dict = field(default_factory=dict)
    disagreements: list = field(default_factory=list)  # refused although the oracle saw no defect
    seconds: float = 0.0
    resets: int = 0

    def count(self, key, n=1):
        self.outcomes[key] = self.outcomes.get(key, 0) + n

    def merge(self, other: "FuzzReport"):
        self.cases += other.cases
        self.calls += other.calls
        for name in ("crashes", "partial", "escapes", "violations", "unreadable", "disagreements"):
            getattr(self, name).extend(getattr(other, name))
        for k, n in other.outcomes.items():
            self.count(k, n)
        self.resets += other.resets

    def to_dict(self):
        return dict(self.__dict__)


def _short(obj, n=300) -> str:
    try:
        text = repr(obj)
    except ValueError:      # an int too long to print
        text = f"<{type(obj).__name__}>"
    return text if len(text) <= n else text[:n] + "..."


def _where(exc: BaseException) -> str:
    tb = traceback.extract_tb(exc.__traceback__)
    last = tb[-1] if tb else None
    return f"{type(exc).__name__}: {str(exc)[:160]}" + (f" at {Path(last.filename).name}:{last.lineno}" if last else "")


def _inside(path: Path, root: Path) -> bool:
    try:
        Path(path).resolve().relative_to(Path(root).resolve())
        return True
    except ValueError:
        return False


# ---- an independent check of a COCO file against the rules -----------------------------------

def _num(x) -> bool:
    if isinstance(x, bool) or not isinstance(x, (int, float)):
        return False
    try:
        return bool(np.isfinite(float(x)))
    except OverflowError:
        return False


def _hashable(x) -> bool:
    try:
        hash(x)
        return True
    except TypeError:
        return False


def _clean_relative(fn: str) -> str | None:
    if not fn or "\x00" in fn or fn[0] in "/\\" or re.match(r"^[A-Za-z]:", fn):
        return None
    parts = re.split(r"[\\/]", fn)
    if ".." in parts:
        return None
    return "/".join(q for q in parts if q not in ("", "."))


def coco_defects(data, good_images: dict, skeleton_names) -> list[str]:
    """What is wrong with a parsed COCO keypoints file, checked independently of
    :func:`kinemark.core.coco.plan_import`, from the COCO keypoint format (images with
    integer ids and a file name, annotations with 3 x K numbers ``[x, y, v, ...]``, v in
    {0, 1, 2}, ``bbox`` [x, y, w, h]) and Kinemark's import rules as documented there
    (names must stay inside the image folder; person categories must match the skeleton;
    labelled points lie inside the stated image size; other categories and crowd regions
    are ignored, not defects). ``good_images``: normalised relative name -> (width, height)
    of the files that really are readable images. Empty list: nothing found wrong."""
    out = []
    K = len(skeleton_names)
    if not isinstance(data, dict):
        return ["not an object"]
    for key in ("images", "annotations", "categories"):
        if not isinstance(data.get(key), list):
            return [f"'{key}' missing or not a list"]
    persons = set()
    for c in data["categories"]:
        if not isinstance(c, dict) or "id" not in c:
            out.append("category without id"); continue
        cid, names = c["id"], c.get("keypoints")
        if isinstance(cid, bool) or not isinstance(cid, int):
            out.append(f"category id {_short(cid, 40)} is not an integer"); continue
        if c.get("name") != "person" and not names:
            continue
        if names is not None and (not isinstance(names, list) or list(names) != list(skeleton_names)):
            out.append("category keypoint names differ from the skeleton"); continue
        persons.add(cid)
    if not persons:
        out.append("no person category")
    images, seen = {}, set()
    for im in data["images"]:
        if not isinstance(im, dict):
            out.append("image not an object"); continue
        iid = im.get("id")
        if isinstance(iid, bool) or not isinstance(iid, int):
            out.append("image id not an integer"); continue
        if iid in seen:
            out.append(f"duplicate image id {iid}"); images.pop(iid, None); continue
        seen.add(iid)
        fn = im.get("file_name")
        rel = _clean_relative(fn) if isinstance(fn, str) else None
        if rel is None or rel not in good_images:
            out.append(f"image {iid}: file name {_short(fn, 60)} is unsafe or not a readable image"); continue
        rw, rh = good_images[rel]
        w, h = im.get("width"), im.get("height")
        bad = False
        for val, real in ((w, rw), (h, rh)):
            if val is None:
                continue
            if not (_num(val) and val > 0) or int(val) != real:
                bad = True
        if bad:
            out.append(f"image {iid}: width/height {_short(w, 30)}x{_short(h, 30)} are not {rw}x{rh}"); continue
        images[iid] = (w, h)
    seen_ann = set()
    for a in data["annotations"]:
        if not isinstance(a, dict):
            out.append("annotation not an object"); continue
        aid = a.get("id")
        if isinstance(aid, bool) or not isinstance(aid, int):
            out.append("annotation id not an integer"); continue
        if aid in seen_ann:
            out.append(f"duplicate annotation id {aid}"); continue
        seen_ann.add(aid)
        cid = a.get("category_id")
        if not _hashable(cid) or cid not in persons:
            continue
        iid = a.get("image_id")
        if not _hashable(iid) or iid not in images:
            out.append(f"annotation {aid}: image {_short(iid, 30)} missing or refused"); continue
        if a.get("iscrowd") not in (None, 0, False):
            continue
        kp = a.get("keypoints")
        if not isinstance(kp, list) or len(kp) != 3 * K or not all(_num(v) for v in kp):
            out.append(f"annotation {aid}: keypoints are not {3 * K} finite numbers"); continue
        w, h = images[iid]
        for j in range(K):
            x, y, v = kp[3 * j: 3 * j + 3]
            if v not in (0, 1, 2):
                out.append(f"annotation {aid}: visibility {v}"); break
            if v > 0 and (x < 0 or y < 0 or (w and x > w) or (h and y > h)):
                out.append(f"annotation {aid}: labelled point outside the image"); break
        else:
            bbox = a.get("bbox")
            if bbox is not None and not (isinstance(bbox, list) and len(bbox) == 4
                                         and all(_num(b) for b in bbox) and bbox[2] >= 0 and bbox[3] >= 0):
                out.append(f"annotation {aid}: bbox {_short(bbox, 40)}")
    return out


# ---- hypothesis strategies --------------------------------------------------------------------

def coco_case_strategy(world: FuzzWorld, skeleton_names):
    """Cases for the COCO import: ("json", obj) written with Python's json (NaN and
    Infinity included, as Python writes them), or ("raw", bytes) for files that are not
    JSON at all (cut short, nested too deeply, bad UTF-8, huge number literals)."""
    from hypothesis import strategies as st
    K = len(skeleton_names)
    scalars = (st.none() | st.booleans() | st.integers(-2 ** 70, 2 ** 70)
               | st.floats(allow_nan=True, allow_infinity=True) | st.text(max_size=6)
               | st.sampled_from(["NaN", "Infinity", "-1", "", "\x00", "../../x.png", "1e999"]))
    junk = st.recursive(scalars, lambda c: st.lists(c, max_size=3)
                        | st.dictionaries(st.text(max_size=4), c, max_size=3), max_leaves=8)
    huge = st.sampled_from([10 ** 400, -10 ** 400, 2 ** 63, 2 ** 64 + 1, 1e308, -1e308, 10 ** 20])
    odd_number = (huge | st.sampled_from(["NaN", "nan", "1", "12.5", "Infinity", True, False, None, [], {}])
                  | st.just(float("nan")) | st.just(float("inf")) | st.just(-0.0) | junk)

    # Each case draws a defect rate that scales every chance of a defect below: a quarter
    # of the cases are sound files, so that the writing path is exercised as well.
    rate_of = st.sampled_from([0.0, 0.0, 0.3, 1.0, 1.0, 2.0])

    def odd(draw, rate, p) -> bool:
        return draw(st.integers(0, 999)) < p * rate * 1000

    def pick(draw, rate, p_odd, good, odd_s=odd_number):
        return draw(odd_s) if odd(draw, rate, p_odd) else good

    @st.composite
    def keypoints(draw, rate, w, h):
        if odd(draw, rate, 0.03):
            return draw(junk)
        n = K if not odd(draw, rate, 0.09) else draw(st.sampled_from([0, 1, K - 1, K + 1, 2 * K, 3]))
        rng = np.random.default_rng(draw(st.integers(0, 2 ** 32 - 1)))
        pts = np.column_stack([np.round(rng.uniform(0, w, n), 2), np.round(rng.uniform(0, h, n), 2),
                               rng.choice([0, 1, 2, 2], n)]).ravel().tolist()
        vals = [float(x) if i % 3 < 2 else int(x) for i, x in enumerate(pts)]
        for _ in range(draw(st.integers(1, 3)) if odd(draw, rate, 0.3) else 0):
            if not vals:
                break
            i = draw(st.integers(0, len(vals) - 1))
            vals[i] = draw(odd_number | st.sampled_from([3, -1, 7, w * 3, -5.0, h + 1]))
        return vals

    @st.composite
    def image(draw, rate, iid):
        im = {}
        if odd(draw, rate, 0.04):
            return draw(junk)
        im["id"] = pick(draw, rate, 0.05, iid, st.integers(0, 4) | odd_number)
        fn = draw(st.sampled_from(world.file_names) | st.text(max_size=12) | junk) if odd(draw, rate, 0.25) \
            else draw(st.sampled_from(list(GOOD_IMAGES)))
        if not odd(draw, rate, 0.03):
            im["file_name"] = fn
        real = GOOD_IMAGES.get(_clean_relative(fn) if isinstance(fn, str) else None, (64, 48))
        for key, val in (("width", real[0]), ("height", real[1])):
            if not odd(draw, rate, 0.15):
                if draw(st.integers(0, 9)) < 8:     # width and height are optional for Kinemark
                    im[key] = val
            elif draw(st.booleans()):
                im[key] = val + draw(st.sampled_from([1, -1, 0.4, 100]))
            else:
                im[key] = draw(odd_number)
        if draw(st.integers(0, 99)) < 10:
            im[draw(st.text(max_size=5))] = draw(junk)
        return im

    @st.composite
    def annotation(draw, rate, aid, image_ids, sizes):
        if odd(draw, rate, 0.03):
            return draw(junk)
        a = {"id": pick(draw, rate, 0.05, aid, st.integers(0, 5) | odd_number)}
        iid = draw(st.sampled_from(image_ids)) if image_ids else 1
        a["image_id"] = pick(draw, rate, 0.06, iid, st.integers(-2, 9) | odd_number)
        a["category_id"] = pick(draw, rate, 0.08, 1,
                                st.sampled_from([2, "1", 1.0, True, None, [1], {"id": 1}]) | junk)
        w, h = sizes.get(a["image_id"], (64, 48)) if _hashable(a["image_id"]) else (64, 48)
        if not odd(draw, rate, 0.02):
            a["keypoints"] = draw(keypoints(rate, w, h))
        r = draw(st.integers(0, 99))
        if not odd(draw, rate, 0.15):
            if r < 65:
                a["bbox"] = [round(draw(st.floats(0, w)), 2), round(draw(st.floats(0, h)), 2),
                             round(draw(st.floats(0, w)), 2), round(draw(st.floats(0, h)), 2)]
        elif r < 50:
            a["bbox"] = draw(st.sampled_from([[1, 2, 3], [0, 0, -1, 5], [0, 0, 1, "2"], None, "0 0 1 1"]))
        else:
            a["bbox"] = draw(junk)
        r = draw(st.integers(0, 99))
        if not odd(draw, rate, 0.15):
            if r < 80:
                a["iscrowd"] = 0
        elif r < 50:
            a["iscrowd"] = 1
        else:
            a["iscrowd"] = draw(junk)
        for key in ("num_keypoints", "area"):
            if draw(st.integers(0, 99)) < 50:
                a[key] = pick(draw, rate, 0.2, 17 if key == "num_keypoints" else 100.0)
        return a

    person = {"id": 1, "name": "person", "supercategory": "person", "keypoints": list(skeleton_names),
              "skeleton": [[16, 14], [14, 12]]}

    @st.composite
    def categories(draw, rate):
        r = draw(st.integers(0, 99))
        if not odd(draw, rate, 0.2):
            cats = [dict(person)]
        elif r < 84:
            cats = [dict(person, keypoints=list(skeleton_names)[::-1])]
        elif r < 87:
            cats = [dict(person, keypoints=list(skeleton_names)[:-1])]
        elif r < 90:
            cats = [dict(person, id=draw(odd_number | st.just("1")))]
        elif r < 92:
            cats = [{k: v for k, v in person.items() if k != "id"}]
        elif r < 94:
            cats = []
        elif r < 96:
            cats = [dict(person, keypoints=draw(junk))]
        else:
            cats = draw(st.lists(junk, max_size=3))
        if odd(draw, rate, 0.15):
            cats.append(draw(st.sampled_from([{"id": 2, "name": "chair"}, {"id": 1, "name": "dup"},
                                              {"id": 3, "name": "person"}, {"id": [1], "name": "x"}])))
        return cats

    @st.composite
    def coco_dict(draw):
        rate = draw(rate_of)
        n_img = draw(st.integers(0, 4))
        images = [draw(image(rate, i + 1)) for i in range(n_img)]
        ids = [im.get("id") for im in images if isinstance(im, dict)]
        ids = [i for i in ids if _hashable(i)] or [1]
        sizes = {}

        def dim(x, default):
            return x if _num(x) and 0 < x < 1e5 else default
        for im in images:
            if isinstance(im, dict) and _hashable(im.get("id")):
                sizes[im.get("id")] = (dim(im.get("width"), 64), dim(im.get("height"), 48))
        anns = [draw(annotation(rate, 100 + j, ids, sizes)) for j in range(draw(st.integers(0, 5)))]
        d = {"images": images, "annotations": anns, "categories": draw(categories(rate))}
        if odd(draw, rate, 0.08):
            r = draw(st.integers(0, 2))
            if r == 0:
                d.pop(draw(st.sampled_from(sorted(d))))
            elif r == 1:
                d[draw(st.sampled_from(sorted(d)))] = draw(junk.filter(lambda x: not isinstance(x, list)))
            else:
                return draw(junk)
        if draw(st.integers(0, 99)) < 15:
            d["info"] = draw(junk)
        return d

    @st.composite
    def case(draw):
        data = draw(coco_dict())
        r = draw(st.integers(0, 99))
        if r < 93:
            return ("json", data)
        text = json.dumps(data)
        kind = draw(st.integers(0, 6))
        if kind == 0:
            raw = text.encode()[: draw(st.integers(0, max(0, len(text) - 1)))]
        elif kind == 1:
            depth = draw(st.sampled_from([100, 5000, 100_000, 300_000]))
            raw = ('{"images": ' + "[" * depth + "]" * depth + ', "annotations": [], "categories": []}').encode()
        elif kind == 2:
            raw = b"\xff\xfe" + text.encode("utf-16-le")
        elif kind == 3:
            raw = b"\xef\xbb\xbf" + text.encode()
        elif kind == 4:
            raw = ('{"images": [{"id": 1' + "9" * draw(st.sampled_from([5000, 20_000])) +
                   ', "file_name": "a.png"}], "annotations": [], "categories": []}').encode()
        elif kind == 5:
            raw = text.encode().replace(b'"', b'\x00', 1)
        else:
            raw = b""
        return ("raw", raw)

    return case()


def _hypothesis_run(strategy, n: int, seed: int, fn):
    """Run ``fn`` on ``n`` generated cases (no shrinking, no example database, no deadline)."""
    from hypothesis import HealthCheck, Phase, given, settings
    from hypothesis import seed as hseed

    @hseed(seed)
    @settings(max_examples=n, database=None, deadline=None, phases=[Phase.generate],
              suppress_health_check=list(HealthCheck), derandomize=False)
    @given(strategy)
    def run(case):
        fn(case)
    run()


def fuzz_coco(n_cases: int = 300, *, seed: int = 0, workdir=None) -> FuzzReport:
    """COCO files through ``ops.import_coco`` under 'refuse' then 'skip', on one project
    reset whenever a case changed it."""
    from . import ops
    from .skeleton import COCO17
    rep = FuzzReport("coco import")
    own = workdir is None
    work = Path(tempfile.mkdtemp(prefix="kinemark-fuzz-")) if own else Path(workdir)
    world = FuzzWorld(work)
    names = list(COCO17.keypoints)
    case_file = world.scratch / "case.json"
    t0 = time.perf_counter()

    def one(case):
        kind, payload = case
        rep.cases += 1
        if kind == "json":
            case_file.write_text(json.dumps(payload), encoding="utf-8")
            defects = coco_defects(payload, GOOD_IMAGES, names)
        else:
            case_file.write_bytes(payload)
            defects = ["not a JSON file"]
            try:
                defects = coco_defects(json.loads(payload.decode("utf-8")), GOOD_IMAGES, names)
            except (ValueError, UnicodeDecodeError, RecursionError):
                pass
        for policy in ("refuse", "skip"):
            rep.calls += 1
            p = world.project
            raised = None
            ch = None
            try:
                ch, _ = ops.import_coco(p, case_file, world.images, policy=policy)
            except KinemarkError as e:
                raised = e
            except Exception as e:      # noqa: BLE001 - counting these is the point
                raised = e
                rep.crashes.append((f"{policy}: {_where(e)}", _short(case, 600)))
            changed = project_digest(p) != world.baseline
            if raised is not None:
                rep.count(f"{policy}: refused")
                if changed:
                    rep.partial.append((f"{policy}: the project changed although the import raised "
                                        f"{type(raised).__name__}", _short(case, 600)))
                elif policy == "refuse" and not defects and isinstance(raised, KinemarkError):
                    rep.disagreements.append((f"refused a file the independent check found sound: "
                                              f"{str(raised)[:200]}", _short(case, 600)))
            else:
                rep.count(f"{policy}: imported" + (" something" if changed else " nothing"))
                if policy == "refuse" and defects:
                    if changed:
                        rep.partial.append((f"refuse wrote from a defective file ({defects[0]})",
                                            _short(case, 600)))
                    else:
                        rep.disagreements.append((f"refuse accepted a defective file, writing nothing "
                                                  f"({defects[0]})", _short(case, 600)))
                for mid in ch.media:
                    mp = p.media_path(p.store.media(mid))
                    if not _inside(mp, world.images):
                        rep.escapes.append((f"{policy}: media {mid} at {mp}", _short(case, 600)))
                if changed:
                    rep.violations.extend((f"{policy}: {v}", _short(case, 300)) for v in check_invariants(p))
            if changed:
                world.reset()

    try:
        _hypothesis_run(coco_case_strategy(world, names), n_cases, seed, one)
    finally:
        rep.seconds = time.perf_counter() - t0
        rep.resets = world.resets
        world.close()
        if own:
            shutil.rmtree(work, ignore_errors=True)
    return rep


# ---- media fuzz ---------------------------------------------------------------------------------

def _media_bases(world: FuzzWorld) -> dict:
    """Valid media to corrupt: OpenCV-written MP4 (mp4v) and AVI (MJPG) clips, a PNG, a JPEG."""
    import cv2
    out = {}
    rng = np.random.default_rng(3)
    for ext, fourcc in ((".mp4", "mp4v"), (".avi", "MJPG")):
        path = world.scratch / f"base{ext}"
        vw = cv2.VideoWriter(str(path), cv2.VideoWriter_fourcc(*fourcc), 10.0, (96, 72))
        if vw.isOpened():
            base = rng.integers(0, 255, (72, 96, 3), dtype=np.uint8)
            for i in range(12):
                img = (base // 2).copy()
                img[:, (i * 7) % 86:(i * 7) % 86 + 10] = (255, 200, 40)
                vw.write(img)
            vw.release()
            out[ext] = path.read_bytes()
        else:
            vw.release()
    for ext in (".png", ".jpg"):
        ok, buf = cv2.imencode(ext, rng.integers(0, 255, (40, 50, 3), dtype=np.uint8))
        out[ext] = buf.tobytes()
    return out


def media_case_strategy(bases: dict):
    from hypothesis import strategies as st
    exts = sorted(bases)
    return st.fixed_dictionaries({
        "base": st.sampled_from(exts),
        "mutation": st.sampled_from(["none", "truncate", "flip", "zero_run", "garbage", "empty", "prepend",
                                     "header_only", "append"]),
        "frac": st.floats(0.0, 1.0),
        "flips": st.lists(st.tuples(st.floats(0.0, 1.0), st.integers(0, 255)), min_size=1, max_size=12),
        "ext": st.sampled_from(["same", "same", "same", ".mp4", ".png", ".jpg", ".avi", ".txt", ""]),
        "where": st.sampled_from(["plain", "plain", "traversal", "absolute", "inside_project", "symlink_out",
                                  "dangling_symlink", "directory", "fifo", "missing"]),
        "strict": st.booleans(),
        "sampling": st.sampled_from([("every", 1), ("every", 3), ("count", 4), ("seconds", 0.5)]),
        "with_good": st.booleans(),
        "participant": st.none() | st.sampled_from(["QB-03", "QB-03'; DROP TABLE media; --"]) | st.text(max_size=8),
    })


def _mutate(data: bytes, c) -> bytes:
    m = c["mutation"]
    n = len(data)
    if m == "truncate":
        return data[: int(c["frac"] * n)]
    if m == "flip":
        b = bytearray(data)
        for pos, val in c["flips"]:
            b[min(n - 1, int(pos * n))] ^= val or 1
        return bytes(b)
    if m == "zero_run":
        i = int(c["frac"] * n)
        return data[:i] + b"\x00" * min(4096, n - i) + data[i + 4096:]
    if m == "garbage":
        return bytes(np.random.default_rng(int(c["frac"] * 1e9)).integers(0, 256, max(1, n // 4), dtype=np.uint8))
    if m == "empty":
        return b""
    if m == "prepend":
        return b"\x00KINEMARK-NOT-A-HEADER\xff" * 3 + data
    if m == "header_only":
        return data[: min(n, 64)]
    if m == "append":
        return data + bytes(range(256)) * 4
    return data


def fuzz_media(n_cases: int = 40, *, seed: int = 0, workdir=None) -> FuzzReport:
    """Corrupt, truncated, mislabelled and oddly placed media through ``ops.add_media``.

    A call that raised must leave the project as it was; a call that added media must
    have stored paths that lead back to exactly the files given, and every sampled frame
    should read back (``Project.read_frame`` checks each against its import checksum; a
    frame that decodes to other pixels than at import is refused, and counted here apart:
    FFmpeg's error concealment can decode a damaged stream differently from run to run)."""
    from . import ops
    from .media import Sampling
    rep = FuzzReport("media import")
    own = workdir is None
    work = Path(tempfile.mkdtemp(prefix="kinemark-fuzz-media-")) if own else Path(workdir)
    world = FuzzWorld(work)
    bases = _media_bases(world)
    good = world.scratch / "good_extra.png"
    import cv2
    cv2.imwrite(str(good), np.random.default_rng(11).integers(0, 255, (20, 30, 3), dtype=np.uint8))
    counter = [0]
    t0 = time.perf_counter()

    def one(c):
        rep.cases += 1
        counter[0] += 1
        n = counter[0]
        ext = c["base"] if c["ext"] == "same" else c["ext"]
        name = f"case{n}{ext}"
        data = _mutate(bases[c["base"]], c)
        where = c["where"]
        folder = world.proj_dir / "media" if where == "inside_project" else world.scratch
        folder.mkdir(exist_ok=True)
        target = folder / name
        if where == "directory":
            target.mkdir()
        elif where == "fifo":
            os.mkfifo(target)
        elif where == "dangling_symlink":
            os.symlink(world.outside / f"gone{n}{ext}", target)
        elif where != "missing":
            target.write_bytes(data)
        if where == "traversal":
            given = world.proj_dir / ".." / "scratch" / name
        elif where == "absolute":
            given = target.resolve()
        elif where == "symlink_out":
            given = world.proj_dir / f"link{n}{ext}"
            os.symlink(target, given)
        else:
            given = target
        paths = [given] + ([good] if c["with_good"] else [])
        kind, val = c["sampling"]
        sampling = Sampling(**{kind: val})
        p = world.project
        rep.calls += 1
        raised = None
        try:
            ch, report = ops.add_media(p, paths, sampling=sampling, strict=c["strict"],
                                       participant=c["participant"])
        except KinemarkError as e:
            raised = e
        except Exception as e:      # noqa: BLE001
            raised = e
            rep.crashes.append((f"add_media: {_where(e)}", _short(c, 400)))
        changed = project_digest(p) != world.baseline
        if raised is not None:
            rep.count("refused")
            if changed:
                rep.partial.append((f"the project changed although add_media raised {type(raised).__name__}",
                                    _short(c, 400)))
        else:
            rep.count("added" if report.added else "nothing added")
            for path, mid, _nf in report.added:
                m = p.store.media(mid)
                if p.media_path(m).resolve() != Path(path).resolve():
                    rep.escapes.append((f"media {mid}: stored as {m.path!r} ({m.path_base}), which leads to "
                                        f"{p.media_path(m).resolve()}, not {Path(path).resolve()}", _short(c, 400)))
                for f in p.store.frames(mid):
                    try:
                        p.read_frame(mid, f.frame_index)
                    except KinemarkError as e:
                        rep.unreadable.append((f"media {mid} frame {f.frame_index} was accepted but does not "
                                               f"read back: {e}", _short(c, 400)))
                        break
                    except Exception as e:  # noqa: BLE001
                        rep.crashes.append((f"read_frame: {_where(e)}", _short(c, 400)))
                        break
            if changed:
                rep.violations.extend((v, _short(c, 300)) for v in check_invariants(p))
            if (c["mutation"] == "none" and where in ("plain", "traversal", "absolute", "inside_project",
                                                      "symlink_out") and c["ext"] == "same"
                    and not any(Path(q).resolve() == Path(given).resolve() for q, *_ in report.added)):
                rep.disagreements.append(("an intact file was not added: "
                                          + "; ".join(m for _, m in report.failed), _short(c, 400)))
        if raised is not None and c["mutation"] == "none" and c["ext"] == "same" and where in (
                "plain", "traversal", "absolute", "inside_project", "symlink_out"):
            rep.disagreements.append((f"an intact file was refused: {str(raised)[:200]}", _short(c, 400)))
        if changed:
            world.reset()
        if target.is_dir() and not target.is_symlink():
            shutil.rmtree(target, ignore_errors=True)
        else:
            target.unlink(missing_ok=True)
        if where == "symlink_out":
            given.unlink(missing_ok=True)

    try:
        _hypothesis_run(media_case_strategy(bases), n_cases, seed, one)
    finally:
        rep.seconds = time.perf_counter() - t0
        rep.resets = world.resets
        world.close()
        if own:
            shutil.rmtree(work, ignore_errors=True)
    return rep


# ---- the fuzz benchmark -------------------------------------------------------------------------

def _worker(what: str, n: int, seed: int, quiet: bool) -> dict:
    if quiet:   # the video decoder's own complaints about broken files go to stderr
        fd = os.open(os.devnull, os.O_WRONLY)
        os.dup2(fd, 2)
        os.close(fd)
    rep = fuzz_coco(n, seed=seed) if what == "coco" else fuzz_media(n, seed=seed)
    return rep.to_dict()


def fuzz_parallel(what: str, n: int, *, workers: int = 2, seed: int = 0, quiet: bool = True) -> FuzzReport:
    """Split ``n`` cases over ``workers`` processes (each with its own world and seed)."""
    import multiprocessing as mp
    from concurrent.futures import ProcessPoolExecutor
    shares = [n // workers + (1 if i < n % workers else 0) for i in range(workers)]
    total = FuzzReport("coco import" if what == "coco" else "media import")
    t0 = time.perf_counter()
    with ProcessPoolExecutor(max_workers=workers, mp_context=mp.get_context("spawn")) as ex:
        futs = [ex.submit(_worker, what, k, seed * 1000 + i, quiet) for i, k in enumerate(shares) if k]
        for f in futs:
            d = f.result()
            r = FuzzReport(d["what"])
            r.__dict__.update(d)
            total.merge(r)
    total.seconds = time.perf_counter() - t0
    return total


def _print_fuzz(rep: FuzzReport, workers: int, label: str, extra: str = ""):
    print(f"fuzz: {label}: {rep.cases} cases ({rep.calls} calls) in {rep.seconds:.1f} s on {workers} worker(s): "
          f"{rep.cases / rep.seconds:.0f} cases/s; project resets {rep.resets}")
    print(f"fuzz: {label}: crashes {len(rep.crashes)} (goal 0); partial writes {len(rep.partial)} (goal 0); "
          f"paths outside their folder {len(rep.escapes)} (goal 0); invariant violations "
          f"{len(rep.violations)} (goal 0){extra}")
    print(f"fuzz: {label}: outcomes " + ", ".join(f"{k} {v}" for k, v in sorted(rep.outcomes.items())))
    for kind in ("crashes", "partial", "escapes", "violations", "unreadable", "disagreements"):
        for msg, case in getattr(rep, kind)[:3]:
            print(f"fuzz:   {kind}: {msg}\n          case: {case[:300]}")


def bench_fuzz(cases: int = 10_000, media_cases: int = 600, seed: int = 0, workers: int = 2):
    try:
        import hypothesis  # noqa: F401
    except ImportError:
        raise KinemarkError("the fuzz benchmark needs hypothesis: pip install -e '.[test]'") from None
    rep = fuzz_parallel("coco", cases, workers=workers, seed=seed)
    _print_fuzz(rep, workers, "COCO import (policies refuse and skip)",
                f"; refusals the independent COCO check did not expect {len(rep.disagreements)}")
    mrep = fuzz_parallel("media", media_cases, workers=workers, seed=seed)
    _print_fuzz(mrep, workers, "media import (corrupt, truncated, mislabelled, linked, traversal paths)",
                f"; intact files refused {len(mrep.disagreements)} (goal 0); accepted files with a frame that "
                f"later decoded to other pixels (refused by the pixel checksum, never shown) {len(mrep.unreadable)}")


# ---- command line for the child ---------------------------------------------------------------

def main(argv=None) -> int:
    import argparse
    ap = argparse.ArgumentParser(prog="python -m kinemark.core.reliability")
    sub = ap.add_subparsers(dest="cmd", required=True)
    c = sub.add_parser("child", help="label a crash-harness project until killed")
    c.add_argument("root")
    c.add_argument("--seed", type=int, default=0)
    c.add_argument("--max-ops", type=int, default=10 ** 9)
    a = ap.parse_args(argv)
    if a.cmd == "child":
        child_main(a.root, a.seed, a.max_ops)
    return 0


if __name__ == "__main__":
    sys.exit(main())
