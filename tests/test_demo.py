"""The headless main job end to end, on the tiny size of the invented scenario."""
import json

import numpy as np
import pytest

from conftest import quiet
from kinemark.core.demo import run_demo, simulate_annotator
from kinemark.core.metrics import joints_needing_move
from kinemark.core.skeleton import COCO17


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    root = tmp_path_factory.mktemp("demo") / "proj"
    return run_demo(root, size="tiny", label=8, every=2, say=lambda *a: None)


def test_demo_runs_end_to_end(demo):
    from pycocotools.coco import COCO
    assert demo.frames > 0 and demo.labelled == 8 and demo.accepted == 8
    data = json.loads(demo.export.read_text())
    assert len(data["annotations"]) == 8
    import contextlib, io
    with contextlib.redirect_stdout(io.StringIO()):
        COCO(str(demo.export))          # the export loads in the reference tool
    assert 0.0 <= demo.ap_raw <= 1.0
    assert demo.moves_raw <= demo.moves_scratch
    text = demo.text()
    assert "keypoint AP" in text and "not a diagnosis" in text


def test_rerun_continues_with_the_next_frames(demo):
    again = run_demo(demo.project, size="tiny", label=5, every=2, say=lambda *a: None)
    assert again.accepted == 13 and again.frames == demo.frames


def test_demo_never_reuses_a_project_it_did_not_build(tmp_path, video):
    """Pointed at a team's own project, the demo refuses before rendering a clip or proposing
    a frame into it."""
    import hashlib
    from kinemark.core.errors import KinemarkError
    from kinemark.core.ops import add_media
    from kinemark.core.project import Project
    from kinemark.core.store import DB_NAME
    p = Project.create(tmp_path / "study", COCO17, owner="ra1")
    add_media(p, [video])
    p.close()
    before = hashlib.sha256((tmp_path / "study" / DB_NAME).read_bytes()).hexdigest()
    with pytest.raises(KinemarkError, match="not the demo's"):
        run_demo(tmp_path / "study", size="tiny", label=2, every=2, say=lambda *a: None)
    assert not (tmp_path / "study" / "clips").exists()
    with Project.open(tmp_path / "study") as again:
        assert again.store.proposal_count() == 0
    assert hashlib.sha256((tmp_path / "study" / DB_NAME).read_bytes()).hexdigest() == before


@pytest.mark.parametrize("args, msg", [({"every": 0}, "--every"), ({"label": -5}, "--label")])
def test_demo_arguments_are_checked_before_any_work(tmp_path, args, msg):
    from kinemark.core.errors import KinemarkError
    kw = {"size": "tiny", "label": 2, "every": 2, **args}
    with pytest.raises(KinemarkError, match=msg):
        run_demo(tmp_path / "d", say=lambda *a: None, **kw)
    assert not (tmp_path / "d").exists()


def test_simulated_annotator_fixes_what_needs_a_move():
    rng = np.random.default_rng(0)
    truth = np.column_stack([np.linspace(100, 200, 17), np.linspace(50, 300, 17), np.full(17, 2.0)])
    truth[16] = (0, 0, 0)
    prop = truth.copy()
    prop[:5, 0] += 40          # five joints far off
    bbox = [90, 40, 120, 270]
    area = bbox[2] * bbox[3]
    lab, src = simulate_annotator(truth, prop, bbox, rng, flip_rate=0.0)
    assert src[:5] == ["human"] * 5 and src[5:16] == ["model"] * 11
    assert joints_needing_move(truth, lab, area, COCO17.sigmas) == 0
    assert lab[16, 2] == 0


def test_bench_queue_runs_on_the_tiny_scenario(demo):
    """Smoke check of `kinemark bench queue` at a reduced size (the full run is a benchmark)."""
    from kinemark.core.bench_queue import STRATEGIES, run
    lines = []
    table = run(budgets=(4, 8), seeds=(0,), project_dir=str(demo.project), say=lines.append)
    text = "\n".join(lines)
    assert "ceiling of the correction itself" in text and "at N=8" in text
    assert "at N=8, paired by held-out split and seed: combined failure recall / random" in text
    assert "scenario seed 7;" in text and "onnxruntime " in text      # which draw, which libraries
    for strat in STRATEGIES:
        recall, oks_adapted, moves_adapted, moves_raw = table[(strat, 8)]
        assert 0.0 <= recall <= 1.0 and 0.0 <= oks_adapted <= 1.0
        assert moves_adapted >= 0 and moves_raw >= 0
    # greedy queues with a fixed seed: the first 4 picks are the start of the first 8,
    # so recall cannot shrink with N (the combined queue draws its seed per budget)
    for strat in ("uncertainty", "novelty"):
        assert table[(strat, 8)][0] >= table[(strat, 4)][0]


def test_bench_queue_tuning_part_runs_on_the_tiny_scenario(demo):
    """Smoke check of `kinemark bench queue --tuning` at a reduced size: the chosen strategies
    (with random and uniform, which the ratios need) and the combined queue in rounds go through
    the tuning with its held-out check, and the table says how many tunings were kept. (At this
    size the tunings are refused; the figures are the benchmark's.)"""
    pytest.importorskip("torch")
    from kinemark.core.bench_queue import ROUNDS, TUNING_ONLY, run
    from kinemark.core.errors import KinemarkError
    with pytest.raises(KinemarkError, match="unknown strategy best"):
        run(budgets=(8,), seeds=(0,), project_dir=str(demo.project), say=lambda *a: None, tuning=True,
            tuning_strategies=("combined", "best"))
    lines = []
    table = run(budgets=(8,), seeds=(0,), project_dir=str(demo.project), say=lines.append, tuning=True,
                tuning_strategies=tuple(ROUNDS) + TUNING_ONLY)
    text = "\n".join(lines)
    assert "4-round (the combined queue in 4 rounds of 2, ranked on the model in use" in text
    assert "typical-first (4 typical picks, then the combined queue in 1 round of 4," in text
    assert "badge-2-round (BADGE in 2 rounds of 4," in text
    assert "combined-then-badge (4 picks from the combined queue, then BADGE in 1 round of 4," in text
    assert "2-round, paired by held-out split and selection seed: / random " in text
    assert "badge, paired by held-out split and selection seed: / random " in text
    assert "oracle-combined, paired by held-out split and selection seed: / random " in text
    assert "the oracle-* rows read the exact truth" in text
    t = table["tuning"]
    assert set(t) == {"random", "uniform", *ROUNDS, *TUNING_ONLY, "pool_ceiling"}
    for strat in ("random", "uniform", *ROUNDS, *TUNING_ONLY):
        raw, corr, tuned, in_use, kept, refused = t[strat]
        assert np.isfinite([raw, corr, tuned, in_use]).all() and 0 <= kept <= 1
        # the figure in use is the tuned model's when kept, else the correction's
        assert in_use == pytest.approx(tuned if kept == 1 else corr) or 0 < kept < 1
    assert np.isfinite(t["pool_ceiling"])


def test_typical_first_round_picks_the_most_typical_pose_of_each_cluster():
    """The bench's "typical-first" round (TypiClust, Hacohen, Dekel & Weinshall, ICML 2022):
    typicality is the inverse of the mean distance to a point's K nearest neighbours, and the
    pick per cluster is its most typical member, largest cluster first (the paper's definition,
    checked here by brute force). On four well-separated blobs OpenCV's k-means finds the blobs
    themselves, so the picks are known without trusting the clustering."""
    from kinemark.core.bench_queue import typical_picks
    rng = np.random.default_rng(5)
    sizes, centres = (30, 20, 12, 6), np.array([[0, 0, 0], [50, 0, 0], [0, 50, 0], [0, 0, 50]], float)
    feats = np.concatenate([c + rng.normal(size=(n, 3)) for n, c in zip(sizes, centres)])
    blob = np.repeat(np.arange(4), sizes)
    order = rng.permutation(len(feats))            # the clusters are not runs of rows
    feats, blob = feats[order], blob[order]
    k = 5
    picks = typical_picks(feats, 4, np.random.default_rng(0), k=k)
    assert [int(blob[i]) for i in picks] == [0, 1, 2, 3]      # one per blob, largest first
    for i in picks:
        members = np.flatnonzero(blob == blob[i])
        mean_knn = [np.mean(sorted(np.linalg.norm(feats[j] - feats[m]) for m in members if m != j)[:k])
                    for j in members]
        assert i == members[int(np.argmin(mean_knn))]
    again = typical_picks(feats, 4, np.random.default_rng(0), k=k)
    assert np.array_equal(picks, again)                        # the same seed, the same picks


def test_bench_queue_draws_another_scenario_only_into_a_new_folder(demo, tmp_path):
    """--scenario-seed never mixes two draws in one folder, nor renders into someone's files."""
    from kinemark.core.bench_queue import run
    from kinemark.core.errors import KinemarkError
    with pytest.raises(KinemarkError, match="drawn with seed 7, not 23"):
        run(budgets=(4,), seeds=(0,), project_dir=str(demo.project), scenario_seed=23, say=lambda *a: None)
    (tmp_path / "notes.txt").write_text("someone's notes")
    with pytest.raises(KinemarkError, match="not empty and holds no scenario"):
        run(budgets=(4,), seeds=(0,), project_dir=str(tmp_path), scenario_seed=23, say=lambda *a: None)
    assert sorted(x.name for x in tmp_path.iterdir()) == ["notes.txt"]
    with pytest.raises(KinemarkError, match="non-negative integer"):
        run(budgets=(4,), seeds=(0,), project_dir=str(tmp_path / "new"), scenario_seed=-1, say=lambda *a: None)


def test_paired_ratio_interval_is_the_percentile_bootstrap_over_pairs():
    """The bench's paired comparison: the ratio of means, and a 95% percentile bootstrap interval
    that resamples whole pairs (Efron, Annals of Statistics, 1979). With 4 pairs there are only
    4^4 equally likely resamples, so the bootstrap distribution is known exactly; the Monte Carlo
    interval must sit near its 2.5th and 97.5th percentiles."""
    import itertools
    import re
    from kinemark.core.bench_queue import paired_ratio
    a = np.array([0.62, 0.71, 0.80, 0.55])
    b = np.array([0.80, 0.79, 0.78, 0.90])
    text = paired_ratio(a, b, "random", draws=40000)
    ratio, lo, hi, wins, n = re.fullmatch(
        r"/ random (\S+) \(95% interval (\S+)-(\S+), fewer moves in (\d) of (\d) pairs\)", text).groups()
    assert float(ratio) == pytest.approx(a.mean() / b.mean(), abs=0.005)
    exact = [a[list(i)].mean() / b[list(i)].mean() for i in itertools.product(range(4), repeat=4)]
    e_lo, e_hi = np.percentile(exact, [2.5, 97.5])
    assert float(lo) == pytest.approx(e_lo, abs=0.015) and float(hi) == pytest.approx(e_hi, abs=0.015)
    assert (int(wins), int(n)) == (3, 4)
    # pairing matters: runs where both strategies found the split hard move together, so the
    # paired interval is narrow; the same numbers with the partners swapped give a wide one
    hard = np.array([0.5, 1.0, 0.6, 1.1])
    interval = lambda t: [float(x) for x in re.search(r"interval (\S+)-(\S+),", t).groups()]
    lo1, hi1 = interval(paired_ratio(hard, hard + 0.1, "random"))
    lo2, hi2 = interval(paired_ratio(hard, (hard + 0.1)[[1, 0, 3, 2]], "random"))
    assert hi1 - lo1 < 0.5 * (hi2 - lo2)


def test_kmeanspp_seeding_draws_in_proportion_to_the_squared_distance():
    """The bench's BADGE picks start k-means++ as that paper does (Arthur & Vassilvitskii, SODA
    2007; Ash et al., ICLR 2020): the row of largest norm first, then each next row with
    probability D(x)^2 / sum D^2, D the distance to the nearest pick so far. Checked on five
    points by the frequencies of the second pick over many seeds, and that an exact duplicate
    of a pick is never drawn while other rows remain."""
    from kinemark.core.bench_queue import kmeanspp_seeding
    x = np.array([[0.0, 0.0], [1.0, 0.0], [0.0, 2.0], [3.0, 0.0], [0.0, 4.0]])
    first = 4                                                  # largest norm
    d2 = ((x - x[first]) ** 2).sum(1)
    expected = d2 / d2.sum()
    draws = 4000
    seconds = [kmeanspp_seeding(x, 2, np.random.default_rng(s))[1] for s in range(draws)]
    assert all(kmeanspp_seeding(x, 1, np.random.default_rng(s))[0] == first for s in range(5))
    freq = np.bincount(seconds, minlength=len(x)) / draws
    assert freq[first] == 0
    # binomial standard error at most 0.008 here; 4 of them
    assert np.abs(freq - expected).max() < 0.032
    dup = np.concatenate([x, x[[4, 4, 4]]])                    # three copies of the first pick
    for s in range(50):
        picks = kmeanspp_seeding(dup, 5, np.random.default_rng(s))
        assert sorted(picks.tolist()) == [0, 1, 2, 3, 4]       # never one of the copies 5-7
    assert len(kmeanspp_seeding(dup, 8, np.random.default_rng(0))) == 8     # duplicates once nothing else is left


def test_oracle_doubt_orders_joints_by_their_coco_oks_similarity_to_the_truth():
    """The bench's diagnostic oracles rank on :func:`true_doubt`: one minus each keypoint's OKS
    similarity to the exact truth. Checked against pycocotools (COCOeval.computeOks, the COCO
    keypoint evaluation's reference code): with one labelled keypoint per frame, a frame's OKS
    is that keypoint's similarity, so the doubt must order the frames as that OKS does,
    reversed. A labelled keypoint the model did not propose is the most doubtful; an
    unlabelled one, however far off, counts nothing."""
    pytest.importorskip("pycocotools")
    from pycocotools.coco import COCO
    from pycocotools.cocoeval import COCOeval
    from kinemark.core.bench_queue import Pool, true_doubt
    K, sig = COCO17.num_keypoints, COCO17.sigma_array
    rng = np.random.default_rng(3)
    n = 7
    joint = rng.integers(0, K, n)                       # the one labelled keypoint per frame
    R = np.full((n, K, 2), np.nan)
    R[np.arange(n), joint] = rng.normal(scale=12.0, size=(n, 2))   # px off the truth
    R[6, joint[6]] = np.nan                             # labelled, not proposed
    other = (joint[0] + 1) % K
    R[0, other] = (500.0, 500.0)                        # far off but not labelled
    vis = np.zeros((n, K))
    vis[np.arange(n), joint] = 2
    area = rng.uniform(2000, 9000, n)
    z = np.zeros(n)                                     # true_doubt reads Rtrue, area, vis and sigmas only
    pool = Pool(frame_ids=np.arange(n), media=z, index=z, group=z, raw_oks=z, unc=z, feats=z, thumbs=z, X=z,
                Rtrue=R, Rlab=R, area=area, vis=vis, kps=z, conf=z, sig={}, sigmas=sig)
    doubt = true_doubt(pool, np.arange(n))
    assert doubt.shape == (n, K) and doubt[0, other] == doubt.min()
    assert doubt[6, joint[6]] == doubt.max()
    truth = np.zeros((K, 3))
    cats = [{"id": 1, "name": "person", "keypoints": list(COCO17.keypoints)}]
    coco_oks = []
    for i in range(6):
        g, d = truth.copy(), truth.copy()
        g[:, :2] = 200.0
        g[joint[i], 2] = 2
        d[:, :2] = 200.0
        d[joint[i], :2] += R[i, joint[i]]               # the proposal's offset from the truth
        gt = COCO()
        gt.dataset = {"images": [{"id": 1, "width": 400, "height": 400, "file_name": "x.png"}],
                      "annotations": [{"id": 1, "image_id": 1, "category_id": 1, "keypoints": g.ravel().tolist(),
                                       "num_keypoints": 1, "bbox": [100, 100, 200, 200], "area": float(area[i]),
                                       "iscrowd": 0}], "categories": cats}
        quiet(gt.createIndex)
        dt = quiet(gt.loadRes, [{"image_id": 1, "category_id": 1, "keypoints": d.ravel().tolist(), "score": 1.0}])
        ev = COCOeval(gt, dt, iouType="keypoints")
        quiet(ev.evaluate)
        coco_oks.append(float(ev.ious[(1, 1)][0, 0]))
    labelled = doubt[np.arange(6), joint[:6]]
    assert np.array_equal(np.argsort(labelled), np.argsort(-np.array(coco_oks)))
