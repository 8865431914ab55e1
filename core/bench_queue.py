"""``kinemark bench queue``: selection strategies measured against the demo ground truth.

Invented data (the Quillon Bay renders) with exact ground truth. For each
split, some participants form the labelling pool and the others are held
out: adaptation is fitted only on frames chosen from the pool and scored only
on the held-out participants' frames, so nothing from an evaluation person
reaches the fit.

Strategies: random; uniform in time; k-means on downsampled frames (common
practice for picking frames to label: cluster small grey thumbnails, take the
frame nearest each centre); uncertainty only; novelty only (k-center
greedy); and the combined queue. Printed per budget: failure recall (share
of the pool's frames where the raw model's OKS to the truth is below 0.5
that the first N picks contain) and, after adapting on the N picks, held-out
mean OKS and joints needing a move per frame; at N=100 (or the largest budget) the ratios to random and uniform
are also given paired by held-out split and seed, with a bootstrap interval
(:func:`paired_ratio`). Nothing is asserted.
"""
from __future__ import annotations

import time
from dataclasses import dataclass

import cv2
import numpy as np

from .adapt import Samples, evaluate, features, fit_correction, regressed_points, to_crop
from .demo import simulate_annotator, truth_for_project
from .metrics import oks
from .ranking import (RankingQueue, RankWeights, frame_uncertainty, joint_uncertainty, pose_features,
                      SIGNALS)

STRATEGIES = ("random", "uniform", "kmeans", "uncertainty", "novelty", "combined")
# labelling in rounds with a tuning after each but the last, later rounds from the combined
# queue ranked on the model then in use (the tuning part of the bench only):
# name -> (strategy of the first round, number of rounds). "uniform-first" starts from frames
# spread evenly in time, which suit a very small budget better than doubt or novelty do (the
# cold-start finding of Hacohen, Dekel & Weinshall, ICML 2022, "Active Learning on a Budget:
# Opposite Strategies Suit High and Low Budgets"); here neither it nor "typical-first", that
# paper's TypiClust, beat the combined queue from the start (DEVELOPERS.md, session 15).
# (the order keeps each strategy's random stream, seeded by its position, as it was)
# A third element names the strategy of the later rounds (default the combined queue): "badge"
# is BADGE's pick (:func:`gradient_embedding`, :func:`kmeanspp_seeding`) on the model in use.
# None of the BADGE variants beat two rounds of the combined queue over selection seeds 0-2
# (DEVELOPERS.md, session 17).
ROUNDS = {"2-round": ("combined", 2), "4-round": ("combined", 4), "3-round": ("combined", 3),
          "uniform-first": ("uniform", 2), "typical-first": ("typical", 2),
          "badge-2-round": ("badge", 2, "badge"), "combined-then-badge": ("combined", 2, "badge")}
# diagnostic picks that read the exact truth, which no team has: the uncertainty-only and the
# combined queue with the model's doubt replaced by its true error per joint (:func:`true_doubt`).
# They bound what better doubt signals could do for selection; not strategies the product runs
ORACLES = ("oracle-uncertainty", "oracle-combined")
# strategies of the tuning part only (they need the network, or are diagnostics): BADGE in one
# round, and the oracles
TUNING_ONLY = ("badge",) + ORACLES
TUNING_STRATEGIES = STRATEGIES + tuple(ROUNDS) + TUNING_ONLY


def round_plan(strat: str) -> tuple[str, int, str]:
    """(strategy of the first round, number of rounds, strategy of the later ones) of ROUNDS[strat]."""
    first, k, *later = ROUNDS[strat]
    return first, k, (later[0] if later else "combined")


@dataclass
class Pool:
    frame_ids: np.ndarray
    media: np.ndarray
    index: np.ndarray
    group: np.ndarray
    raw_oks: np.ndarray
    unc: np.ndarray
    feats: np.ndarray
    thumbs: np.ndarray
    X: np.ndarray          # adaptation features (proposal in crop coordinates, confidence, embedding)
    Rtrue: np.ndarray      # residual to the exact truth, crop units (NaN where not labelled / missing)
    Rlab: np.ndarray       # residual to the simulated annotator's label
    area: np.ndarray
    vis: np.ndarray
    kps: np.ndarray        # the raw proposals (x, y, v) and their per-joint doubt, for re-ranking
    conf: np.ndarray
    sig: dict
    sigmas: np.ndarray     # the skeleton's OKS sigmas (for :func:`true_doubt`)


def _residual(prop_xy, target, conf, region, pv):
    r = to_crop(target[:, :2], region) - to_crop(prop_xy, region)
    bad = (target[:, 2] <= 0) | (conf <= 0) | (pv <= 0) | ~np.isfinite(r).all(axis=1)
    r[bad] = np.nan
    return r


def load_pool(project, clips_dir, seed: int = 0) -> Pool:
    skel = project.skeleton
    gt = truth_for_project(project, clips_dir)
    media = {m.id: m for m in project.store.all_media()}
    frames = {f.id: f for f in project.store.frames()}
    props = {p.frame_id: p for p in project.store.proposals() if not p.adapted and p.region}
    ids = sorted(f for f in props if f in gt.by_frame)
    rng = np.random.default_rng(seed)
    rows = dict(media=[], index=[], group=[], raw=[], thumbs=[], X=[], Rt=[], Rl=[], area=[], vis=[])
    P = [props[f] for f in ids]
    # the correction's features as fit_project builds them: with the regression head's
    # points when every proposal has them
    use_reg = all(regressed_points(p.signals, skel.num_keypoints) is not None for p in P)
    for fid, p in zip(ids, P):
        kps, bbox, area = gt.by_frame[fid]
        f = frames[fid]
        m = media[f.media_id]
        rows["media"].append(f.media_id)
        rows["index"].append(f.frame_index)
        rows["group"].append(m.participant_code)
        rows["raw"].append(oks(kps, p.keypoints, area, skel.sigmas, bbox) if (kps[:, 2] > 0).any() else 1.0)
        img = project.read_frame(f.media_id, f.frame_index)
        rows["thumbs"].append(cv2.resize(cv2.cvtColor(img, cv2.COLOR_BGR2GRAY), (16, 12),
                                         interpolation=cv2.INTER_AREA).ravel().astype(np.float32) / 255.0)
        reg = p.region
        pc = to_crop(p.keypoints[:, :2], reg)
        rg = regressed_points(p.signals, skel.num_keypoints) if use_reg else None
        rows["X"].append(features(pc[None], np.nan_to_num(p.confidence)[None],
                                  None if p.embedding is None else p.embedding[None],
                                  None if rg is None else to_crop(rg, reg)[None])[0])
        rows["Rt"].append(_residual(p.keypoints[:, :2], kps, p.confidence, reg, p.keypoints[:, 2]))
        lab, _ = simulate_annotator(kps, p.keypoints, bbox, rng)
        rows["Rl"].append(_residual(p.keypoints[:, :2], lab, p.confidence, reg, p.keypoints[:, 2]))
        rows["area"].append(area / (reg["w"] * reg["h"]))
        rows["vis"].append(kps[:, 2])
    kps = np.stack([p.keypoints for p in P])
    conf = np.stack([np.nan_to_num(p.confidence) for p in P])
    sig = {n: np.stack([p.signals.get(n, np.full(skel.num_keypoints, np.nan)) for p in P])
           for n in SIGNALS[:-1]}
    unc = frame_uncertainty(joint_uncertainty(sig, conf))
    return Pool(np.array(ids), np.array(rows["media"]), np.array(rows["index"]), np.array(rows["group"]),
                np.array(rows["raw"]), unc, pose_features(kps, skel), np.stack(rows["thumbs"]),
                np.stack(rows["X"]), np.stack(rows["Rt"]), np.stack(rows["Rl"]), np.array(rows["area"]),
                np.stack(rows["vis"]), kps, conf, sig, skel.sigma_array)


def true_doubt(pool: Pool, pos: np.ndarray) -> np.ndarray:
    """(len(pos), K) the raw proposal's true error per joint, as the queue's doubt would be if it
    were perfect: one minus the keypoint's OKS similarity to the exact truth (a labelled joint
    the model did not propose counts 1, an unlabelled one 0), turned into its percentile rank
    over the joints of ``pos`` as :func:`ranking.joint_uncertainty` turns the model's signals.
    Reads the truth: for the diagnostic ORACLES only."""
    from .adapt import _sim
    from .ranking import _percentile_rank
    R, vis = pool.Rtrue[pos], pool.vis[pos]
    err = 1.0 - _sim(np.nansum(R ** 2, axis=2), pool.area[pos], pool.sigmas)
    err[~np.isfinite(R).all(axis=2)] = 1.0
    err[vis <= 0] = 0.0
    return _percentile_rank(err.ravel()).reshape(err.shape)


def select(strategy: str, pool: Pool, cand: np.ndarray, n: int, rng) -> np.ndarray:
    """Positions (into pool arrays) of the first n frames a strategy would queue from ``cand``."""
    n = min(n, len(cand))
    if strategy == "random":
        return rng.choice(cand, n, replace=False)
    if strategy == "uniform":
        order = cand[np.lexsort((pool.index[cand], pool.media[cand]))]
        pos = np.linspace(0, len(order) - 1, n).round().astype(int)
        return order[np.unique(pos)]
    if strategy == "kmeans":
        data = pool.thumbs[cand].astype(np.float32)
        crit = (cv2.TERM_CRITERIA_EPS + cv2.TERM_CRITERIA_MAX_ITER, 30, 1e-3)
        cv2.setRNGSeed(int(rng.integers(1 << 30)))
        _, labels, centres = cv2.kmeans(data, n, None, crit, 1, cv2.KMEANS_PP_CENTERS)
        picks = []
        for k in range(n):
            members = np.flatnonzero(labels.ravel() == k)
            if len(members):
                d = ((data[members] - centres[k]) ** 2).sum(1)
                picks.append(cand[members[np.argmin(d)]])
        return np.array(picks)
    if strategy == "typical":      # first rounds in ROUNDS only
        return cand[typical_picks(pool.feats[cand], n, rng)]
    oracle = strategy in ORACLES
    if oracle:
        strategy = strategy.removeprefix("oracle-")
    weights = {"uncertainty": RankWeights(novelty=0.0, same_clip_decay=0.0, dedup_window=-1),
               "novelty": RankWeights(uncertainty=0.0, same_clip_decay=0.0),
               "combined": RankWeights(seed=int(rng.integers(1 << 30)))}[strategy]
    unc = frame_uncertainty(true_doubt(pool, cand)) if oracle else pool.unc[cand]
    q = RankingQueue(pool.feats[cand], unc, pool.media[cand], pool.index[cand], weights)
    return cand[[p[0] for p in q.select(n)]]


def typical_picks(feats: np.ndarray, n: int, rng, k: int = 20) -> np.ndarray:
    """The most typical pose of each of ``n`` k-means clusters (OpenCV's k-means++ seeding),
    largest cluster first: TypiClust of Hacohen, Dekel & Weinshall, "Active Learning on a
    Budget: Opposite Strategies Suit High and Low Budgets", ICML 2022, with no labels yet.
    Typicality is the inverse mean distance to a frame's ``k`` nearest neighbours in its
    cluster (the paper's k = 20). Positions into ``feats``."""
    data = np.ascontiguousarray(feats, np.float32)
    n = min(n, len(data))
    crit = (cv2.TERM_CRITERIA_EPS + cv2.TERM_CRITERIA_MAX_ITER, 30, 1e-3)
    cv2.setRNGSeed(int(rng.integers(1 << 30)))
    _, labels, _ = cv2.kmeans(data, n, None, crit, 1, cv2.KMEANS_PP_CENTERS)
    labels = labels.ravel()
    sizes = np.bincount(labels, minlength=n)
    picks = []
    for c in np.argsort(-sizes, kind="stable"):
        members = np.flatnonzero(labels == c)
        if not len(members):
            continue
        x = data[members].astype(np.float64)
        d = np.sqrt(np.maximum(((x[:, None, :] - x[None, :, :]) ** 2).sum(-1), 0))
        kk = min(k, len(members) - 1)
        if kk == 0:
            picks.append(members[0])
            continue
        mean_nn = np.sort(d, axis=1)[:, 1:kk + 1].mean(axis=1)
        picks.append(members[int(np.argmin(mean_nn))])     # the highest typicality 1 / mean_nn
    return np.array(picks, int)


def gradient_embedding(dec, weights: dict, td, rows: np.ndarray, chans: np.ndarray) -> np.ndarray:
    """Per frame of ``rows``, the gradient of the tuning's loss (:func:`tuning.train`: softmax
    cross-entropy over each heatmap's cells against :func:`tuning.target_maps`) with
    respect to the weights of the decoder's last 1x1 convolution, taking the model's own peak
    cell as the label, summed over the crop and its mirror: the gradient embedding of BADGE
    (Ash, Zhang, Krishnamurthy, Langford & Agarwal, "Deep Batch Active Learning by Diverse,
    Uncertain Gradient Lower Bounds", ICLR 2020). Its length grows with the model's doubt (a
    peaked heatmap at its own peak gives a small gradient) and its direction says which
    weights the frame would move. (len(rows), len(chans) * features) float32."""
    from . import tuning as T
    torch = T._torch()
    last = next(n for n in reversed(dec.nodes) if n.op_type == "Conv")
    net = T.torch_decoder(dec, weights, outputs=[last.input[0], dec.output])
    ch = torch.from_numpy(np.asarray(chans, np.int64))
    out = []
    with torch.no_grad():
        for s in range(0, len(rows), 16):
            r = rows[s:s + 16]
            ins = [torch.from_numpy(f[r].reshape((-1,) + f.shape[2:]).astype(np.float32)) for f in td.features]
            f, z = net(*ins)                                   # (B, F, H, W), (B, H, W, 39)
            b, nf, h, w = f.shape
            z = z.reshape(b, h * w, -1)[:, :, ch]
            p = torch.softmax(z, dim=1)
            peak = z.argmax(dim=1)                             # (B, C)
            g = T.target_maps((peak % w).float(), (peak // w).float(), h, w)
            grad = torch.einsum("bfk,bkc->bcf", f.reshape(b, nf, h * w), p - g)
            out.append(grad.reshape(len(r), 2, -1).sum(1).numpy())
    return np.concatenate(out) if out else np.zeros((0, len(chans) * dec.weights[last.input[1]].shape[1]),
                                                     np.float32)


def kmeanspp_seeding(emb: np.ndarray, n: int, rng) -> np.ndarray:
    """``n`` rows of ``emb`` picked by k-means++ seeding (Arthur & Vassilvitskii, "k-means++: The
    Advantages of Careful Seeding", SODA 2007) as BADGE starts it: first the row of largest
    norm, then each next row drawn with probability proportional to its squared distance to
    the nearest row picked so far. Positions into ``emb``."""
    x = np.asarray(emb, np.float64)
    n = min(n, len(x))
    if n == 0:
        return np.zeros(0, int)
    picks = [int(np.argmax((x ** 2).sum(1)))]
    d2 = ((x - x[picks[0]]) ** 2).sum(1)
    while len(picks) < n:
        total = d2.sum()
        if not total > 0:        # every row left coincides with a pick: take the first unpicked
            j = int(np.flatnonzero(~np.isin(np.arange(len(x)), picks))[0])
        else:
            j = int(rng.choice(len(x), p=d2 / total))
        picks.append(j)
        d2 = np.minimum(d2, ((x - x[j]) ** 2).sum(1))
    return np.array(picks, int)


def paired_ratio(a: np.ndarray, b: np.ndarray, name: str, *, wins: str = "fewer moves", lower: bool = True,
                 draws: int = 10000, seed: int = 0) -> str:
    """mean(a) / mean(b) over paired runs (the same held-out split and selection seed), with a
    95% percentile bootstrap interval that resamples the pairs (Efron, "Bootstrap methods:
    another look at the jackknife", Annals of Statistics, 1979), and in how many pairs ``a`` is
    the better (``lower``: the smaller is better; ``wins`` says what better means). With a few
    pairs the interval is rough; it says how far the runs let one see."""
    a, b = np.asarray(a, float), np.asarray(b, float)
    idx = np.random.default_rng(seed).integers(0, len(a), size=(draws, len(a)))
    with np.errstate(divide="ignore", invalid="ignore"):      # nothing found by the baseline: inf
        boot = a[idx].mean(axis=1) / b[idx].mean(axis=1)
        ratio = a.mean() / b.mean()
        lo, hi = np.percentile(boot, [2.5, 97.5])
    won = int((a < b).sum() if lower else (a > b).sum())
    return (f"/ {name} {ratio:.2f} (95% interval {lo:.2f}-{hi:.2f}, {wins} in "
            f"{won} of {len(a)} pairs)")


def _subset(pool: Pool, pos, residual) -> Samples:
    return Samples(pool.X[pos], residual[pos], pool.group[pos], pool.area[pos], pool.vis[pos])


def scenario_seed_of(clips) -> int | None:
    """The seed the scenario in ``clips`` was drawn with (its ``scenario.json``), or None."""
    import json
    from pathlib import Path
    try:
        return int(json.loads((Path(clips) / "scenario.json").read_text())["seed"])
    except (OSError, ValueError, KeyError, TypeError):
        return None


def versions() -> str:
    """The versions of the libraries the figures depend on (the dependencies are not pinned)."""
    import onnxruntime
    return f"numpy {np.__version__}, onnxruntime {onnxruntime.__version__}, opencv {cv2.__version__}"


def run(budgets=(25, 50, 100, 200), seeds=(0, 1, 2, 3, 4), project_dir="sample_project", clips_dir=None,
        say=print, scenario_seed: int | None = None, tuning: bool = False, tuning_seeds=(0,),
        tuning_strategies=None):
    """``scenario_seed``: draw the invented scenario with this seed (other participants, same
    kinds of clips) into ``project_dir/clips`` when that folder has none, so the figures can be
    checked on a second draw; a folder already holding another draw is refused.

    ``tuning``: also measure network tuning (core.tuning, needs PyTorch) at N=100 (or the largest
    budget) for ``tuning_seeds``, each strategy's picks going through what ``kinemark adapt
    --tune`` does: the held-out check on the labelled participants, then the model in use (the
    tuned one, else the correction, else the raw model) scored on the held-out participants.
    ``tuning_strategies``: which of TUNING_STRATEGIES to tune on (default all; random and
    uniform always, the ratios need them); the ones in ROUNDS are the combined queue in rounds
    with a tuning between them, as a team would label, tune, and label on; "badge" (TUNING_ONLY)
    picks by the network's own gradients (:func:`gradient_embedding`), so only here."""
    from .errors import KinemarkError
    if tuning_strategies is not None:
        bad = sorted(set(tuning_strategies) - set(TUNING_STRATEGIES))
        if bad:
            raise KinemarkError(f"unknown strategy {', '.join(bad)}: choose from {', '.join(TUNING_STRATEGIES)}")
    from pathlib import Path
    from .project import Project
    from .store import DB_NAME
    root = Path(project_dir)
    clips = Path(clips_dir) if clips_dir else root / "clips"
    if scenario_seed is not None:
        from .synth.scenario import check_seed
        check_seed(scenario_seed)
        if (clips / "scenario.json").exists():
            have = scenario_seed_of(clips)
            if have != scenario_seed:
                raise KinemarkError(f"{clips} holds the scenario drawn with seed {have}, not {scenario_seed}: "
                                    f"pass --project with a new folder for another draw")
        elif root.exists() and any(root.iterdir()):
            raise KinemarkError(f"{root} is not empty and holds no scenario: pass --project with a new "
                                f"folder for another draw")
        else:
            from .demo import ensure_clips
            say(f"bench queue: drawing the invented scenario with seed {scenario_seed} into {clips}")
            ensure_clips(clips, size="demo", seed=scenario_seed)
    if not (clips / "scenario.json").exists():
        raise KinemarkError(f"no scenario clips in {clips}: run this from the repository root, or pass "
                            f"--project with the sample project's folder")
    if not (root / DB_NAME).exists():
        say(f"bench queue: {root} has no project yet; building it and proposing every frame first "
            f"('kinemark demo' does the same)")
        from .demo import build_project
        from . import ops
        p, _ = build_project(root, clips, every=3)
        ops.propose(p)
        p.close()
    t0 = time.perf_counter()
    with Project.open(root) as p:
        pool = load_pool(p, clips)
        sig = p.skeleton.sigma_array
    say(f"bench queue: scenario seed {scenario_seed_of(clips)}; {versions()}")
    say(f"bench queue: {len(pool.frame_ids)} frames with proposals and exact truth, "
        f"{len(set(pool.group))} participants; raw-model failures (OKS < 0.5): "
        f"{int((pool.raw_oks < 0.5).sum())} ({np.mean(pool.raw_oks < 0.5):.0%}); loaded in "
        f"{time.perf_counter() - t0:.1f} s")
    groups = sorted(set(pool.group))
    # held-out pairs of participants, rotated
    splits = [tuple(groups[i::3]) for i in range(3)] if len(groups) >= 3 else [(groups[-1],)]
    res = {(s, b): [] for s in STRATEGIES for b in budgets}
    raw_moves = []
    # how far this kind of correction can go at all, whatever the selection: fitted on every
    # pool frame (simulated labels, then exact truth), and on the held-out participants' own
    # frames with the exact truth, scored on those same frames (in-sample: an upper bound)
    ceiling = {"pool_labels": [], "pool_truth": [], "own_truth": []}
    for held in splits:
        test = np.isin(pool.group, held)
        cand = np.flatnonzero(~test)
        fail = cand[pool.raw_oks[cand] < 0.5]
        tpos = np.flatnonzero(test)
        held_out = _subset(pool, tpos, pool.Rtrue)
        base = evaluate(None, held_out, sig)
        raw_moves.append(base["moves_raw"])
        for key, fit_on in (("pool_labels", _subset(pool, cand, pool.Rlab)),
                            ("pool_truth", _subset(pool, cand, pool.Rtrue)), ("own_truth", held_out)):
            ceiling[key].append(evaluate(fit_correction(fit_on, sig), held_out, sig)["moves_adapted"])
        for seed in seeds:
            for strat in STRATEGIES:
                for b in budgets:
                    rng = np.random.default_rng([seed, b, STRATEGIES.index(strat)])
                    picks = select(strat, pool, cand, b, rng)
                    recall = len(np.intersect1d(picks, fail)) / max(len(fail), 1)
                    corr = fit_correction(_subset(pool, picks, pool.Rlab), sig)
                    ev = evaluate(corr, _subset(pool, tpos, pool.Rtrue), sig)
                    res[(strat, b)].append((recall, ev["oks_adapted"], ev["moves_adapted"], ev["moves_raw"]))
    say(f"held-out splits: {', '.join('+'.join(h) for h in splits)}; seeds {list(seeds)}; "
        f"labels from the simulated annotator (click noise), scored against the exact truth")
    raw_mean = float(np.mean(raw_moves))
    say(f"raw model on held-out participants: joints to move {raw_mean:.2f} per frame")
    say(f"ceiling of the correction itself (no selection): fitted on every frame of the labelling pool, "
        f"with the simulated labels {np.mean(ceiling['pool_labels']):.2f} "
        f"({np.mean(ceiling['pool_labels']) / raw_mean:.2f}x raw), with the exact truth "
        f"{np.mean(ceiling['pool_truth']):.2f} ({np.mean(ceiling['pool_truth']) / raw_mean:.2f}x raw); fitted "
        f"on the held-out participants' own frames with the exact truth and scored on them (in-sample, "
        f"an upper bound) {np.mean(ceiling['own_truth']):.2f} ({np.mean(ceiling['own_truth']) / raw_mean:.2f}x raw)")
    say(f"{'strategy':<12}" + "".join(f"| N={b:<4} recall  OKS  moves " for b in budgets))
    table = {}
    for strat in STRATEGIES:
        line = f"{strat:<12}"
        for b in budgets:
            r = np.array(res[(strat, b)])
            table[(strat, b)] = r.mean(axis=0)
            line += f"|   {r[:, 0].mean():5.2f}  {r[:, 1].mean():5.3f} {r[:, 2].mean():5.2f} "
        say(line)
    b = 100 if 100 in budgets else budgets[-1]
    rnd, uni, comb = table[("random", b)], table[("uniform", b)], table[("combined", b)]
    say(f"at N={b}: combined failure recall / random = {comb[0] / max(rnd[0], 1e-9):.2f} (goal >= 2); "
        f"combined adapted moves / random = {comb[2] / rnd[2]:.2f}, / uniform = {comb[2] / uni[2]:.2f} "
        f"(goal <= 0.8 each); adapted / raw moves = {comb[2] / comb[3]:.2f} (goal <= 0.5)")
    runs = {s: np.array(res[(s, b)]) for s in ("random", "uniform", "combined")}
    say(f"at N={b}, paired by held-out split and seed: combined failure recall "
        f"{paired_ratio(runs['combined'][:, 0], runs['random'][:, 0], 'random', wins='more found', lower=False)}; "
        f"combined adapted moves " + "; ".join(paired_ratio(runs["combined"][:, 2], runs[base][:, 2], base)
                                               for base in ("random", "uniform")))
    need = 0.8 * min(rnd[2], uni[2])
    pool_fit = float(np.mean(ceiling["pool_labels"]))
    say(f"at N={b}: the 0.8x goals need combined adapted moves <= {need:.2f}; the same correction fitted "
        f"on every pool frame (simulated labels, no selection) reaches {pool_fit:.2f}"
        + (", so no choice of frames can meet them with this correction" if pool_fit > need else ""))
    if tuning:
        table["tuning"] = _tuning_table(root, pool, splits, tuning_seeds, b, sig, say,
                                        tuning_strategies or TUNING_STRATEGIES)
    return table


def _tuning_table(root, pool: Pool, splits, seeds, budget: int, sig, say, strategies=TUNING_STRATEGIES):
    """Network tuning on each strategy's first ``budget`` picks (see :func:`run`)."""
    from . import tuning as T
    from .adapt import from_crop
    from .pose import landmark as L
    from .pose.base import session_options
    from .project import Project
    import onnxruntime as ort
    t0 = time.perf_counter()
    with Project.open(root) as p:
        data, base = T._base_model_bytes(p)
        props = {q.frame_id: q for q in p.store.proposals(base) if not q.adapted and q.region}
        graph, dec = T.feature_graph(data)
        sess = ort.InferenceSession(graph, sess_options=session_options(2), providers=["CPUExecutionProvider"])
        mapping = L.skeleton_mapping(p.skeleton)
        skel = p.skeleton
        pairs = []
        for i, fid in enumerate(pool.frame_ids):
            q = props[int(fid)]
            reg = q.region
            lab = from_crop(to_crop(q.keypoints[:, :2], reg) + pool.Rlab[i], reg)
            ok = np.isfinite(lab).all(axis=1)
            kps = np.column_stack([np.nan_to_num(lab), np.where(ok, pool.vis[i], 0)])
            pairs.append((q, kps, pool.area[i] * reg["w"] * reg["h"], pool.group[i]))
        td = T.collect(p, pairs, sess, dec, mapping)
    # scored against the exact truth, with the same definitions as the correction's figures
    truth = td.labels.copy()
    for i, fid in enumerate(pool.frame_ids):
        reg = props[int(fid)].region
        xy = from_crop(to_crop(props[int(fid)].keypoints[:, :2], reg) + pool.Rtrue[i], reg)
        ok = np.isfinite(xy).all(axis=1)
        truth[i] = np.column_stack([np.nan_to_num(xy), np.where(ok, pool.vis[i], 0)])
    from dataclasses import replace
    exact = replace(td, labels=truth, cache=td.cache)
    used = mapping[mapping >= 0]
    chans = np.union1d(used, L.MODEL_FLIP_PERMUTATION[used])
    chans = chans[chans < L.NUM_BODY].astype(int)
    import torch
    say(f"network tuning (torch {torch.__version__}): decoder inputs of {len(td.frame_ids)} frames computed "
        f"in {time.perf_counter() - t0:.0f} s; N={budget}, seeds {list(seeds)}, the same held-out splits")
    strategies = [s for s in TUNING_STRATEGIES if s in set(strategies) | {"random", "uniform"}]
    rows = {s: [] for s in strategies}
    t_fit, pool_tuned, done = [], [], 0
    interim_kept = {s: [] for s in ROUNDS}

    def tuned_on(picks):
        """What ``kinemark adapt --tune`` does with labels of ``picks``: (weights, correction,
        why not used ("" when used))."""
        sub = replace(td, features=[f[picks] for f in td.features], landmarks=td.landmarks[picks],
                      regions=[td.regions[i] for i in picks], targets=td.targets[picks],
                      labels=td.labels[picks], area=td.area[picks], groups=td.groups[picks],
                      frame_ids=td.frame_ids[picks], proposed=td.proposed[picks], cache={})
        s = _subset(pool, picks, pool.Rlab)
        corr = fit_correction(s, sig)
        summary = T.cross_validate(dec, sub, sig, mapping, chans, correction=s if corr.active else None)
        w = T.train(dec, sub, np.arange(len(picks)))
        return w, corr, T.why_not(summary, corr.active), summary

    def next_round(got, cand, n, rng, w_in_use):
        """The combined queue's next ``n`` picks once ``got`` are labelled, ranked as LiveQueue
        ranks them: on the tuned model's proposals when a tuning is in use (``w_in_use``), else
        on the raw ones; novelty against the labels of ``got``."""
        rest = np.setdiff1d(cand, got)
        doubt = {k: pool.sig[k][rest] for k in pool.sig}
        kps = pool.kps[rest]
        if w_in_use is not None:
            xy, tuned = T.decoded(td, rest, T.heatmaps(dec, w_in_use, td, rest), mapping, chans)
            doubt.update(tuned)       # visibility, presence and the passes' points are untouched
            kps = np.concatenate([xy, kps[:, :, 2:]], axis=2)
        unc = frame_uncertainty(joint_uncertainty(doubt, pool.conf[rest]))
        q = RankingQueue(pose_features(kps, skel), unc, pool.media[rest], pool.index[rest],
                         RankWeights(seed=int(rng.integers(1 << 30))), pose_features(td.labels[got], skel))
        return rest[[p[0] for p in q.select(n)]]

    def badge(w, rest, n, rng):
        """BADGE's ``n`` picks from ``rest`` with the decoder weights ``w`` (the model in use)."""
        return rest[kmeanspp_seeding(gradient_embedding(dec, w, td, rest, chans), n, rng)]

    def in_rounds(strat, cand, rng):
        """The picks of ROUNDS[strat]: the first round by its strategy (on the raw model's
        proposals), then after each round what ``kinemark adapt --tune`` does with the labels
        so far, and the next round by its later strategy (the combined queue, or BADGE) on the
        model then in use (the tuned one if its held-out check kept it, else the raw one)."""
        first, k, later = round_plan(strat)
        sizes = np.diff(np.linspace(0, budget, k + 1).round().astype(int))
        got = np.sort(badge(dec.weights, cand, int(sizes[0]), rng) if first == "badge"
                      else select(first, pool, cand, int(sizes[0]), rng))
        for n in sizes[1:]:
            if len(got) < T.MIN_FRAMES or len(set(pool.group[got].tolist())) < T.MIN_PARTICIPANTS:
                w, why = None, "too few labels to tune on"      # kinemark adapt --tune refuses
            else:
                w, _, why, _ = tuned_on(got)
            interim_kept[strat].append(not why)
            if later == "badge":
                more = badge(dec.weights if why else w, np.setdiff1d(cand, got), int(n), rng)
            else:
                more = next_round(got, cand, int(n), rng, None if why else w)
            got = np.sort(np.concatenate([got, more]))
        return got

    for held in splits:
        test = np.isin(pool.group, held)
        cand, tpos = np.flatnonzero(~test), np.flatnonzero(test)
        raw_xy = T.points(exact, tpos, T.heatmaps(dec, dec.weights, exact, tpos), mapping, chans)
        _, raw_moves = T.moves(exact, tpos, raw_xy, sig)
        w_pool = T.train(dec, td, cand)            # no selection: every pool frame, simulated labels
        xy = T.points(exact, tpos, T.heatmaps(dec, w_pool, exact, tpos), mapping, chans)
        pool_tuned.append(T.moves(exact, tpos, xy, sig)[1])
        for seed in seeds:
            for strat in strategies:
                rng = np.random.default_rng([seed, budget, TUNING_STRATEGIES.index(strat)])
                t1 = time.perf_counter()
                if strat in ROUNDS:
                    picks = in_rounds(strat, cand, rng)
                elif strat == "badge":
                    picks = np.sort(badge(dec.weights, cand, budget, rng))
                else:
                    picks = np.sort(select(strat, pool, cand, budget, rng))
                w, corr, why, summary = tuned_on(picks)
                done += 1
                if strat not in ROUNDS:
                    t_fit.append(time.perf_counter() - t1)
                xy = T.points(exact, tpos, T.heatmaps(dec, w, exact, tpos), mapping, chans)
                _, tuned_moves = T.moves(exact, tpos, xy, sig)
                ev = evaluate(corr, _subset(pool, tpos, pool.Rtrue), sig)
                kept = not why
                in_use = tuned_moves if kept else ev["moves_adapted"]
                # refused because its held-out check did not beat the raw model (1) or the correction (2)
                refused = 0 if kept else (1 if T.why_not(summary, False) else 2)
                # the check's figures on the labelled participants, to score its choice between the
                # tuning and the correction against the held-out participants (NaN: no correction)
                nested = summary.get("heldout_moves_correction", np.nan)
                own = corr.summary["heldout_moves_adapted"] if corr.active else np.nan
                rows[strat].append((raw_moves, ev["moves_adapted"], tuned_moves, in_use, kept, refused,
                                    summary["heldout_moves_tuned"], nested, own))
        say(f"  held out {'+'.join(held)}: {done} of {len(splits) * len(seeds) * len(rows)} "
            f"tunings done, {time.perf_counter() - t0:.0f} s so far")
    width = max(12, max(map(len, strategies)) + 1)      # the names line up with their figures
    say(f"{'strategy':<{width}}| raw   correction  tuned  in use  (tuning kept)   [joints to move per frame, "
        f"held-out participants, N={budget}]")
    out = {}
    for strat in strategies:
        r = np.array(rows[strat], float)
        out[strat] = r[:, :6].mean(axis=0)
        why = [f"{int((r[:, 5] == k).sum())} as no better than {what}" for k, what in
               ((1, "the raw model"), (2, "the correction")) if (r[:, 5] == k).any()]
        say(f"{strat:<{width}}| {r[:, 0].mean():4.2f}  {r[:, 1].mean():6.2f}  {r[:, 2].mean():9.2f}  "
            f"{r[:, 3].mean():5.2f}   {int(r[:, 4].sum())} of {len(r)}"
            + (f" (refused {', '.join(why)}, by the check on the labelled participants)" if why else ""))
    # the held-out check's choice between the tuning and a correction, against the held-out
    # participants: scored with the correction on the same folds (nested, what the check does)
    # and with the correction's own cross-validated figure (what it did before session 18)
    every = np.array([r for strat in strategies for r in rows[strat]], float)
    both = every[np.isfinite(every[:, 7])]
    if len(both):
        better = both[:, 2] < both[:, 1]                # the tuning leaves fewer moves on held-out participants
        right_nested = int(((both[:, 6] < both[:, 7]) == better).sum())
        right_own = int(((both[:, 6] < both[:, 8]) == better).sum())
        say(f"network tuning: the held-out check's choice between the tuning and a correction fitted on the same "
            f"labels, against the held-out participants: right in {right_nested} of {len(both)} (the tuning "
            f"better in {int(better.sum())}); with the correction's own cross-validated figure instead, right in "
            f"{right_own}; mean figures on the labelled participants: tuning {both[:, 6].mean():.2f}, correction "
            f"on the same folds {both[:, 7].mean():.2f}, its own {both[:, 8].mean():.2f}; on the held-out "
            f"participants {both[:, 2].mean():.2f} and {both[:, 1].mean():.2f}")
    rnd, uni = out["random"], out["uniform"]
    if "combined" in out:
        comb = out["combined"]
        say(f"network tuning at N={budget}: combined in-use moves / random = {comb[3] / rnd[3]:.2f}, / uniform = "
            f"{comb[3] / uni[3]:.2f} (goal <= 0.8 each); / raw = {comb[3] / comb[0]:.2f} (goal <= 0.5)")
    for strat in (s for s in strategies if s in ROUNDS):
        r, kept = out[strat], interim_kept[strat]
        first, k, later = round_plan(strat)
        size = f"{'about ' if budget % k else ''}{budget // k}"
        name = {"combined": "the combined queue", "badge": "BADGE"}
        picks = {"combined": "picks from the combined queue", "badge": "picks by BADGE"}.get(first, f"{first} picks")
        how = (f"{name[first]} in {k} rounds of {size}" if first == later else
               f"{size} {picks}, then {name[later]} in {k - 1} round{'s' * (k > 2)} of {size}")
        say(f"network tuning at N={budget}, {strat} ({how}, "
            f"ranked on the model in use after the tuning that follows each round; the tunings between "
            f"rounds were kept in {sum(kept)} of {len(kept)}): in-use moves / random = {r[3] / rnd[3]:.2f}, "
            f"/ uniform = {r[3] / uni[3]:.2f} (goal <= 0.8 each); / raw = {r[3] / r[0]:.2f}")
    for strat in (s for s in strategies if s not in ("random", "uniform")):
        say(f"network tuning at N={budget}, {strat}, paired by held-out split and selection seed: "
            + "; ".join(paired_ratio(np.array(rows[strat], float)[:, 3], np.array(rows[base], float)[:, 3], base)
                        for base in ("random", "uniform")))
    if any(s in ORACLES for s in strategies):
        say("network tuning: the oracle-* rows read the exact truth (the queue's doubt replaced by each joint's "
            "true error): a bound on what better doubt could do for selection, not picks a team can make")
    say(f"network tuning: a tuning with its held-out check took {np.median(t_fit):.1f} s (median)")
    need = 0.8 * min(rnd[3], uni[3])
    ceiling = float(np.mean(pool_tuned))
    say(f"network tuning at N={budget}: the 0.8x goals need combined in-use moves <= {need:.2f}; tuning on "
        f"every frame of the labelling pool (simulated labels, no selection, no held-out check) reaches "
        f"{ceiling:.2f} ({ceiling / rnd[0]:.2f}x raw)")
    out["pool_ceiling"] = ceiling
    return out
