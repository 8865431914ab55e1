"""The main job, headless, on the invented Quillon Bay clinic scenario.

``kinemark demo`` builds the sample project from the scenario's clips, runs
the bundled model over every sampled frame, ranks the queue, plays an
annotator on the top frames from the exact ground truth (with click noise and
visibility decisions), plays a reviewer accepting them, adapts the proposals,
exports COCO, and prints what it measured. All data here is invented: the
figures describe the pipeline on rendered figures, not on any real patient.
"""
from __future__ import annotations

import contextlib
import io
import json
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .errors import KinemarkError
from .metrics import joints_needing_move
from .model import ACCEPTED

ANNOTATOR, REVIEWER = "ra-demo", "lead-demo"


@dataclass
class GroundTruth:
    """Exact ground truth per (media id, frame index): keypoints (17, 3), bbox, area."""

    by_frame: dict = field(default_factory=dict)     # frame_id -> (kps, bbox, area)


def _quiet(fn, *a, **k):
    with contextlib.redirect_stdout(io.StringIO()):
        return fn(*a, **k)


def load_clip_truth(gt_path: Path) -> dict:
    """frame_index -> (keypoints (K, 3), bbox, area) from a clip's COCO ground truth file."""
    data = json.loads(Path(gt_path).read_text())
    idx = {im["id"]: im.get("frame_index", im["id"] - 1) for im in data["images"]}
    out = {}
    for a in data["annotations"]:
        out[idx[a["image_id"]]] = (np.array(a["keypoints"], float).reshape(-1, 3), a["bbox"], float(a["area"]))
    return out


def truth_for_project(project, clips_dir: Path) -> GroundTruth:
    gt = GroundTruth()
    frames = project.store.frames()
    by_media = {}
    for m in project.store.all_media():
        stem = m.display_name.rsplit(".", 1)[0]
        path = Path(clips_dir) / f"{stem}.coco.json"
        if path.exists():
            by_media[m.id] = load_clip_truth(path)
    for f in frames:
        t = by_media.get(f.media_id, {}).get(f.frame_index)
        if t is not None:
            gt.by_frame[f.id] = t
    return gt


def keypoint_ap(gt: GroundTruth, proposals: dict, skeleton, frame_ids=None) -> float:
    """COCO keypoint AP of proposals against the ground truth, by pycocotools' COCOeval."""
    try:
        from pycocotools.coco import COCO
        from pycocotools.cocoeval import COCOeval
    except ImportError:
        raise KinemarkError("pycocotools is needed for keypoint AP (pip install pycocotools)") from None
    from .coco import category, results_entry
    ids = [f for f in (frame_ids if frame_ids is not None else gt.by_frame) if f in gt.by_frame and f in proposals]
    if not ids:
        return float("nan")
    images, anns = [], []
    for n, fid in enumerate(ids):
        kps, bbox, area = gt.by_frame[fid]
        images.append({"id": fid, "width": 10000, "height": 10000, "file_name": f"{fid}.png"})
        anns.append({"id": n + 1, "image_id": fid, "category_id": 1, "keypoints": kps.ravel().tolist(),
                     "num_keypoints": int((kps[:, 2] > 0).sum()), "bbox": list(bbox), "area": area,
                     "iscrowd": 0})
    coco_gt = COCO()
    coco_gt.dataset = {"images": images, "annotations": anns, "categories": [category(skeleton)]}
    _quiet(coco_gt.createIndex)
    res = [results_entry(fid, proposals[fid][0], proposals[fid][1]) for fid in ids]
    coco_dt = _quiet(coco_gt.loadRes, res)
    ev = COCOeval(coco_gt, coco_dt, iouType="keypoints")
    ev.params.kpt_oks_sigmas = skeleton.sigma_array
    _quiet(ev.evaluate)
    _quiet(ev.accumulate)
    _quiet(ev.summarize)
    return float(ev.stats[0])


def moves_per_frame(gt: GroundTruth, proposals: dict, sigmas, frame_ids) -> tuple[float, float]:
    """Mean joints needing a move per frame: (with proposals, from scratch)."""
    with_p, scratch = [], []
    for fid in frame_ids:
        if fid not in gt.by_frame:
            continue
        kps, _bbox, area = gt.by_frame[fid]
        p = proposals.get(fid)
        with_p.append(joints_needing_move(kps, None if p is None else p[0], area, sigmas))
        scratch.append(joints_needing_move(kps, None, area, sigmas))
    if not with_p:
        return float("nan"), float("nan")
    return float(np.mean(with_p)), float(np.mean(scratch))


def simulate_annotator(truth: np.ndarray, proposal: np.ndarray | None, bbox, rng,
                       *, tolerance: float = 0.02, flip_rate: float = 0.03):
    """What a careful research assistant would save, from the exact truth.

    A proposed joint within ``tolerance`` x the person box's diagonal of the
    truth is kept (source "model"); any other labelled joint is clicked at the
    truth plus Gaussian click noise of about 0.4 % of the box diagonal (at
    least 1 px) (source "human"). Visibility follows the truth, with a small
    chance of calling a visible joint occluded or the reverse. Points the
    truth has outside the frame are left unlabelled (v = 0).
    """
    truth = np.asarray(truth, float)
    K = len(truth)
    diag = float(np.hypot(bbox[2], bbox[3])) or 100.0
    sigma = max(1.0, 0.004 * diag)
    out = np.zeros((K, 3))
    sources = ["human"] * K
    for j in range(K):
        v = truth[j, 2]
        if v <= 0:
            sources[j] = "model" if proposal is not None and proposal[j, 2] <= 0 else "human"
            continue
        if rng.random() < flip_rate:
            v = 3 - v     # 1 <-> 2: an honest disagreement about occlusion
        if proposal is not None and proposal[j, 2] > 0 and \
                np.hypot(*(proposal[j, :2] - truth[j, :2])) <= tolerance * diag:
            out[j] = (proposal[j, 0], proposal[j, 1], v)
            sources[j] = "model"
        else:
            out[j] = (truth[j, 0] + rng.normal(0, sigma), truth[j, 1] + rng.normal(0, sigma), v)
    return out, sources


@dataclass
class DemoSummary:
    project: Path
    frames: int
    participants: int
    ap_raw: float
    moves_raw: float
    moves_scratch: float
    labelled: int
    accepted: int
    adapted_joints: int
    moves_adapted_unlabelled: float
    moves_raw_unlabelled: float
    heldout: dict
    export: Path
    timings: dict
    failed_frames: int

    def text(self) -> str:
        ratio = self.moves_raw / self.moves_scratch if self.moves_scratch else float("nan")
        lines = [
            "Kinemark demo - Quillon Bay Stroke Rehabilitation Clinic (invented scenario, rendered figures)",
            f"  project          {self.project}",
            f"  frames           {self.frames} sampled frames from {self.participants} participants"
            + (f"; {self.failed_frames} frame(s) failed in the model" if self.failed_frames else ""),
            f"  bundled model    keypoint AP {self.ap_raw:.3f} against the exact ground truth "
            f"(pycocotools COCOeval, OKS with COCO sigmas)",
            f"  joints to move   {self.moves_raw:.2f} per frame with proposals vs {self.moves_scratch:.2f} from "
            f"scratch: ratio {ratio:.2f} (goal <= 0.30; a joint needs a move when its OKS similarity to "
            f"the truth is below 0.5, or it is missing)",
            f"  labelled         {self.labelled} top-ranked frames by a simulated annotator; "
            f"{self.accepted} accepted by a simulated reviewer",
        ]
        if self.adapted_joints:
            lines.append(
                f"  adaptation       {self.adapted_joints} joint(s) corrected; on the {self.heldout.get('unlabelled_frames', 0)} "
                f"frames not labelled: joints to move {self.moves_raw_unlabelled:.2f} raw -> "
                f"{self.moves_adapted_unlabelled:.2f} adapted (same participants as the labels; the "
                f"held-out-participant figure is in 'kinemark adapt')")
        else:
            lines.append("  adaptation       kept the raw model (no joint's correction beat it on held-out participants)")
        lines += [
            f"  export           {self.export} (accepted labels only, COCO keypoints)",
            "  timings          " + ", ".join(f"{k} {v:.1f} s" for k, v in self.timings.items()),
            "  Research data, not a diagnosis: these figures describe invented, rendered people.",
        ]
        return "\n".join(lines)


def ensure_clips(clips_dir: Path, *, size: str, seed: int, progress=None) -> Path:
    clips_dir = Path(clips_dir)
    if (clips_dir / "scenario.json").exists():
        return clips_dir
    from .synth import render_scenario
    render_scenario(clips_dir, seed=seed, size=size, progress=progress)
    return clips_dir


DEMO_MARK = "demo_scenario"      # project setting: set on the projects build_project creates


def is_demo_project(project) -> bool:
    """Whether ``project`` is one the demo built: marked so at creation; a project built before
    the mark existed counts when every one of its media is a clip of the scenario beside it."""
    if project.store.get_meta(DEMO_MARK):
        return True
    media = project.store.all_media()
    try:
        scenario = json.loads((project.root / "clips" / "scenario.json").read_text())
        names = {c["name"] for c in scenario["clips"]}
    except (OSError, ValueError, KeyError, TypeError):
        return False
    return bool(media) and all(Path(m.display_name).stem in names for m in media)


def _not_the_demos(root) -> KinemarkError:
    return KinemarkError(f"{root} already holds a project that is not the demo's: the demo adds its invented "
                         "clips, model proposals and simulated labels, so it only reuses its own project. "
                         "Choose another folder with --out")


def build_project(root: Path, clips_dir: Path, *, every: int, progress=None):
    from . import ops
    from .media import Sampling
    from .project import Project
    from .skeleton import COCO17
    from .store import DB_NAME
    if (Path(root) / DB_NAME).exists():
        p = Project.open(root)
        if not is_demo_project(p):
            p.close()
            raise _not_the_demos(root)
        return p, False
    p = Project.create(root, COCO17, owner="lead-qb")
    try:
        p.store.set_meta(DEMO_MARK, "quillon-bay")
        p.store.add_user(ANNOTATOR, "annotator", by=p.user().id)
        p.store.add_user(REVIEWER, "reviewer", by=p.user().id)
        scenario = json.loads((Path(clips_dir) / "scenario.json").read_text())
        clips = scenario["clips"]
        for n, c in enumerate(clips):
            if progress:
                progress(n, len(clips), f"adding {c['name']}")
            ops.add_media(p, [Path(clips_dir) / f"{c['name']}.mp4"], participant=c["participant"],
                          session=int(c["session"]), sampling=Sampling(every=every))
        if progress:
            progress(len(clips), len(clips), "clips added")
    except BaseException:
        p.close()
        raise
    return p, True


def run_demo(root: Path, *, clips_dir: Path | None = None, size: str = "demo", seed: int = 7,
             label: int = 60, every: int = 3, progress_factory=None, say=print) -> DemoSummary:
    from . import ops, review
    from .adapt import apply_to, load_correction
    from .ranking import rank_queue
    bar = progress_factory or (lambda: None)
    root = Path(root)
    clips_dir = Path(clips_dir) if clips_dir else root / "clips"
    if int(every) < 1:
        raise KinemarkError(f"--every must be at least 1 (every sampled frame), not {every}")
    if int(label) < 0:
        raise KinemarkError(f"--label must be 0 or more frames, not {label}")
    if root.exists() and not root.is_dir():
        raise KinemarkError(f"--out {root} is a file, not a folder")
    if clips_dir.exists() and not clips_dir.is_dir():
        raise KinemarkError(f"--clips {clips_dir} is a file, not a folder")
    from .store import DB_NAME
    if (root / DB_NAME).exists():       # refuse a person's own project before rendering into it
        from .project import Project
        with Project.open(root) as existing:
            if not is_demo_project(existing):
                raise _not_the_demos(root)
    t = {}
    t0 = time.perf_counter()
    say(f"[1/6] scenario clips in {clips_dir}")
    ensure_clips(clips_dir, size=size, seed=seed, progress=bar())
    t["render"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    say(f"[2/6] project {root}")
    p, fresh = build_project(root, clips_dir, every=every, progress=bar())
    try:
        t["import"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        say("[3/6] model proposals (bundled BlazePose GHUM full, CPU)")
        _, rep = ops.propose(p, frames="unlabelled", progress=bar())
        t["proposals"] = time.perf_counter() - t0
        gt = truth_for_project(p, clips_dir)
        if not gt.by_frame:
            raise KinemarkError(f"no ground truth found beside the clips in {clips_dir}")
        raw = {pr.frame_id: (pr.keypoints, pr.score) for pr in p.store.proposals() if not pr.adapted}
        all_ids = sorted(gt.by_frame)
        ap = keypoint_ap(gt, raw, p.skeleton, all_ids)
        moves_raw, moves_scratch = moves_per_frame(gt, raw, p.skeleton.sigma_array, all_ids)

        t0 = time.perf_counter()
        say(f"[4/6] ranking the queue and labelling its top {label} frames (simulated annotator)")
        queue = [e for e in rank_queue(p, label) if e.frame_id in gt.by_frame]
        rng = np.random.default_rng(seed)
        ra, lead = p.store.user(ANNOTATOR), p.store.user(REVIEWER)
        labelled = []
        tick = bar()
        for n, e in enumerate(queue):
            kps, bbox, _ = gt.by_frame[e.frame_id]
            prop = raw.get(e.frame_id)
            ann, src = simulate_annotator(kps, None if prop is None else prop[0], bbox, rng)
            ch = review.edit(p, e.frame_id, ann, src, user=ra.name)
            aid = ch.annotations[0]
            review.submit(p, aid, user=ra.name)
            labelled.append(aid)
            if tick:
                tick(n + 1, len(queue), "labelling")
        say("[5/6] review (simulated reviewer accepts) and adaptation")
        for aid in labelled:
            review.accept(p, aid, user=lead.name)
        t["labelling"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        ch, corr = ops.adapt(p)
        t["adaptation"] = time.perf_counter() - t0
        labelled_frames = {p.store.annotation_by_id(a).frame_id for a in labelled}
        rest = [f for f in all_ids if f not in labelled_frames]
        adapted = {}
        corr_active = load_correction(p, rep.model_hash)
        for pr in p.store.proposals(rep.model_hash):
            if pr.frame_id in rest:
                if corr_active is not None and pr.region:
                    k2, _ = apply_to(corr_active, pr.keypoints, pr.confidence, pr.embedding, pr.region,
                                     ["model"] * len(pr.keypoints), pr.signals)
                else:
                    k2 = pr.keypoints
                adapted[pr.frame_id] = (k2, pr.score)
        m_raw_rest, _ = moves_per_frame(gt, raw, p.skeleton.sigma_array, rest)
        m_ad_rest, _ = moves_per_frame(gt, adapted, p.skeleton.sigma_array, rest)
        say("[6/6] export")
        out = root / "exports" / "accepted.coco.json"
        ops.export_coco(p, out, states=[ACCEPTED])
        n_frames = p.store.frame_count()
        parts = len(p.store.participants())
        accepted = p.store.state_counts()[ACCEPTED]
    finally:
        p.close()
    return DemoSummary(project=root, frames=n_frames, participants=parts, ap_raw=ap, moves_raw=moves_raw,
                       moves_scratch=moves_scratch, labelled=len(labelled), accepted=accepted,
                       adapted_joints=int(corr.use.sum()), moves_adapted_unlabelled=m_ad_rest,
                       moves_raw_unlabelled=m_raw_rest, heldout={**corr.summary, "unlabelled_frames": len(rest)},
                       export=out, timings=t, failed_frames=len(rep.failed))


# ---- the sample project on first open -------------------------------------------------------

SAMPLE_EVERY = 3


def sample_needs_building(root) -> bool:
    """A folder holding the demo clips (``clips/scenario.json``) but no project yet (neither a
    database nor a team-mode pointer), as the shipped ``sample_project`` is on a fresh clone."""
    from .project import TEAM_FILE
    from .store import DB_NAME
    root = Path(root)
    return (root.is_dir() and (root / "clips" / "scenario.json").is_file()
            and not (root / DB_NAME).exists() and not (root / TEAM_FILE).exists())


def build_sample_project(root, *, every: int = SAMPLE_EVERY, progress=None) -> bool:
    """Build the project from ``root/clips`` when :func:`sample_needs_building`; True if it
    built one. Adds the clips only (no model run, nothing labelled): the person labels."""
    if not sample_needs_building(root):
        return False
    from .store import DB_NAME
    root = Path(root)
    try:
        p, fresh = build_project(root, root / "clips", every=every, progress=progress)
    except BaseException:
        # half a project would open as a broken one next time: start again from the clips instead
        for f in root.glob(DB_NAME + "*"):
            f.unlink(missing_ok=True)
        raise
    p.close()
    return fresh
