import numpy as np
import pytest

from kinemark.core.adapt import (Correction, Samples, apply_to, evaluate, fit_correction, from_crop,
                                 to_crop)
from kinemark.core.skeleton import COCO17

SIG = COCO17.sigma_array


def _synthetic(n_per=20, groups=("A", "B", "C", "D"), offset=(0.03, -0.02), noise=0.004, seed=0,
               embed_dim=0):
    """Invented test data: proposals whose joints 9 and 10 (wrists) sit a fixed offset from the truth."""
    rng = np.random.default_rng(seed)
    N, K = n_per * len(groups), 17
    pc = rng.uniform(-0.4, 0.4, (N, K, 2))
    conf = rng.uniform(0.3, 1.0, (N, K))
    R = rng.normal(0, noise, (N, K, 2))
    R[:, [9, 10]] += offset
    X = np.hstack([pc.reshape(N, -1), conf])
    if embed_dim:
        X = np.hstack([X, rng.normal(size=(N, embed_dim))])
    g = np.repeat(np.array(groups), n_per)
    return Samples(X=X, R=R, groups=g, area=np.full(N, 0.3), vis=np.full((N, K), 2.0))


def test_crop_coordinates_round_trip():
    reg = {"cx": 310.0, "cy": 205.0, "w": 180.0, "h": 180.0, "angle": 0.6}
    xy = np.random.default_rng(0).uniform(0, 600, (17, 2))
    np.testing.assert_allclose(from_crop(to_crop(xy, reg), reg), xy, atol=1e-9)
    # the region's centre is the origin; a point one region-width along the region's x axis is (1, 0)
    p = np.array([reg["cx"] + np.cos(0.6) * 180, reg["cy"] + np.sin(0.6) * 180])
    np.testing.assert_allclose(to_crop(p, reg), [1.0, 0.0], atol=1e-12)


def test_removes_a_planted_systematic_offset():
    train = _synthetic(seed=1)
    test = _synthetic(seed=2, groups=("E", "F"))
    corr = fit_correction(train, SIG)
    assert corr.use[9] and corr.use[10]
    before = evaluate(None, test, SIG)
    after = evaluate(corr, test, SIG)
    # the residual left on the wrists is about the noise, not the planted offset
    pred = corr.predict_residual(test.X, 17)
    left = np.abs(test.R[:, [9, 10]] - pred[:, [9, 10]]).mean()
    assert left < 0.01 < np.abs(test.R[:, [9, 10]]).mean()
    assert after["oks_adapted"] > before["oks_raw"]


def test_rejected_when_it_would_make_things_worse():
    # no systematic error at all: pure noise residuals. Fitting noise must not beat the raw model
    # on held-out participants for (nearly) any joint; where it does not, the joint stays raw.
    s = _synthetic(offset=(0.0, 0.0), noise=0.02, seed=3, embed_dim=40)
    corr = fit_correction(s, SIG)
    assert corr.use.sum() <= 2
    for j in range(17):
        if not corr.use[j]:
            assert j not in corr.models
        else:
            assert corr.heldout_adapted[j] > corr.heldout_raw[j]


def test_needs_more_than_one_participant():
    s = _synthetic(groups=("A",))
    corr = fit_correction(s, SIG)
    assert not corr.active and "2 participants" in corr.summary["reason"]


def test_held_out_participants_never_reach_the_fit():
    """Fitting on the training participants only: changing the held-out people's data changes nothing."""
    full = _synthetic(seed=5, groups=("A", "B", "C", "D", "E"))
    train_mask = np.isin(full.groups, ["A", "B", "C"])
    c1 = fit_correction(full.take(train_mask), SIG)
    tampered = Samples(full.X.copy(), full.R.copy(), full.groups, full.area, full.vis)
    tampered.R[~train_mask] += 5.0
    tampered.X[~train_mask] *= -3
    c2 = fit_correction(tampered.take(train_mask), SIG)
    for j in c1.models:
        for a, b in zip(c1.models[j], c2.models[j]):
            np.testing.assert_array_equal(a, b)


def test_json_round_trip_and_apply():
    corr = fit_correction(_synthetic(seed=7), SIG, "h")
    back = Correction.from_json(corr.to_json())
    reg = {"cx": 100.0, "cy": 100.0, "w": 200.0, "h": 200.0, "angle": 0.0}
    kps = np.column_stack([np.linspace(20, 180, 17), np.linspace(30, 170, 17), np.full(17, 2)])
    kps[0, 2] = 0
    a, sa = apply_to(corr, kps, np.full(17, 0.8), None, reg, ["model"] * 17, None)
    b, sb = apply_to(back, kps, np.full(17, 0.8), None, reg, ["model"] * 17, None)
    np.testing.assert_allclose(a, b)
    assert sa[9] == "adapted" and sa[0] == "model"           # uncorrected / absent joints stay as they are
    assert a[9, 0] - kps[9, 0] == pytest.approx(0.03 * 200, abs=2.0)   # the planted offset, in pixels


def _one_view_offset(seed, groups, share=0.3, offset=0.25):
    """Invented test data: in one camera view (a share of every participant's frames, told
    apart by feature 0) the knee (joint 13) is proposed ``offset`` too high; elsewhere
    the residual is small noise. Plus a few wild, unpredictable misses on the ankle (15)."""
    s = _synthetic(seed=seed, groups=groups, offset=(0.0, 0.0), noise=0.004)
    rng = np.random.default_rng(seed + 100)
    view = rng.uniform(size=len(s.X)) < share
    s.X[:, 0] = np.where(view, 0.35, -0.35) + rng.normal(0, 0.02, len(s.X))
    s.R[view, 13, 1] += offset
    wild = rng.uniform(size=len(s.X)) < 0.08
    s.R[wild, 15] += rng.normal(0, 0.5, (wild.sum(), 2))
    return s, view


def test_a_large_systematic_offset_is_learnt_not_trimmed():
    # The offset is over 3x the knee's median residual, so a fixed 3x-median trim would
    # drop exactly the frames that carry it; cross-validation must choose not to trim.
    train, _ = _one_view_offset(1, ("A", "B", "C", "D", "E"))
    test, view = _one_view_offset(2, ("F", "G"))
    corr = fit_correction(train, SIG)
    assert corr.use[13] and corr.trim[13] == float("inf")
    pred = corr.predict_residual(test.X, 17)
    assert np.abs(test.R[view, 13, 1] - pred[view, 13, 1]).mean() < 0.03 < np.abs(test.R[view, 13, 1]).mean()
    only_trimmed = fit_correction(train, SIG, trims=(3.0,))
    assert not only_trimmed.use[13]       # the old fixed trim could not learn it
    # the cross-validated share of held-out knees needing a move (OKS similarity below 0.5):
    # the view's share of frames raw, about none corrected; kept through saving
    assert corr.heldout_move_raw[13] > 0.2 and corr.heldout_move_adapted[13] < 0.05
    assert corr.summary["heldout_moves_adapted"] < corr.summary["heldout_moves_raw"] - 0.2
    back = Correction.from_json(corr.to_json())
    assert back.heldout_move_adapted == corr.heldout_move_adapted
    after, before = evaluate(corr, test, SIG), evaluate(None, test, SIG)
    assert after["moves_adapted"] < before["moves_raw"]


def test_wild_misses_do_not_become_a_correction():
    # the ankle's wild misses are unpredictable: no correction is kept for it, trimmed or not
    train, _ = _one_view_offset(3, ("A", "B", "C", "D", "E"))
    corr = fit_correction(train, SIG)
    assert not corr.use[15]
    back = Correction.from_json(corr.to_json())
    assert back.trim == corr.trim


def test_no_correction_for_frames_unlike_every_labelled_one():
    # Labels come from one camera view only (feature 0 near +0.35, as a biased queue might
    # give). Cross-validation over those labels cannot see how the fit extrapolates, so frames
    # far from every labelled one keep the raw proposal; frames like them are corrected.
    s, view = _one_view_offset(4, ("A", "B", "C", "D", "E"), share=0.5)
    train = s.take(view)
    corr = fit_correction(train, SIG)
    assert corr.use[13]
    other, other_view = _one_view_offset(5, ("F", "G"), share=0.5)
    far = other.X[~other_view].copy()
    far[:, 0] = -3.0                                   # well away from every labelled frame
    near = other.X[other_view]
    assert corr.covers(near).mean() > 0.9 and not corr.covers(far).any()
    assert np.all(corr.predict_residual(far, 17) == 0.0)
    assert np.abs(corr.predict_residual(near, 17)[:, 13, 1]).mean() > 0.1
    back = Correction.from_json(corr.to_json())
    np.testing.assert_array_equal(back.covers(near), corr.covers(near))


@pytest.mark.parametrize("n", [30, 200])      # fewer frames than features, and more
def test_ridge_path_equals_one_fit_per_penalty(n):
    from kinemark.core.adapt import ridge_fit, ridge_path, ridge_predict
    rng = np.random.default_rng(n)
    X, Y = rng.normal(size=(n, 60)), rng.normal(size=(n, 2))
    Xt = rng.normal(size=(10, 60))
    lams = (0.3, 10.0, 1e4)
    for lam, m in zip(lams, ridge_path(X, Y, lams)):
        np.testing.assert_allclose(ridge_predict(m, Xt), ridge_predict(ridge_fit(X, Y, lam), Xt),
                                   rtol=1e-7, atol=1e-9)


def test_the_regression_heads_points_let_the_correction_follow_where_they_disagree():
    """Invented test data, built through samples_from as fit_project does: on the knee
    (joint 13) the truth sits 60 % of the way from the reported point to the regression
    head's point, which differs from frame to frame. Only a correction that sees the
    regressed points can learn it; one fitted with them also needs them to apply."""
    from types import SimpleNamespace

    from kinemark.core.adapt import regressed_points, samples_from
    rng = np.random.default_rng(5)
    reg = {"cx": 200.0, "cy": 200.0, "w": 200.0, "h": 200.0, "angle": 0.0}
    pairs = []
    for n in range(120):
        kps = np.column_stack([rng.uniform(120, 280, 17), rng.uniform(120, 280, 17), np.full(17, 2.0)])
        regressed = kps[:, :2] + rng.normal(0, 12, (17, 2))
        truth = kps.copy()
        truth[:, :2] += rng.normal(0, 0.5, (17, 2))
        truth[13, :2] = kps[13, :2] + 0.6 * (regressed[13] - kps[13, :2])
        sig = {"regressed_x": regressed[:, 0].tolist(), "regressed_y": regressed[:, 1].tolist()}
        prop = SimpleNamespace(region=reg, keypoints=kps, confidence=np.full(17, 0.9), embedding=None,
                               signals=sig)
        pairs.append((prop, truth, 100.0 * 160.0, "ABCDEF"[n % 6]))
    assert np.allclose(regressed_points(pairs[0][0].signals, 17), np.column_stack(
        [pairs[0][0].signals["regressed_x"], pairs[0][0].signals["regressed_y"]]))
    plain = fit_correction(samples_from(pairs[:90], 17, with_embedding=False), SIG)
    with_reg = fit_correction(samples_from(pairs[:90], 17, with_embedding=False, with_regression=True), SIG)
    with_reg.with_regression = True
    assert with_reg.use[13] and not plain.use[13]
    test = samples_from(pairs[90:], 17, with_embedding=False, with_regression=True)
    pred = with_reg.predict_residual(test.X, 17)
    assert np.abs(test.R[:, 13] - pred[:, 13]).mean() < 0.3 * np.abs(test.R[:, 13]).mean()
    # applied to a proposal: moved towards the regressed point; without them, the raw proposal stands
    prop, truth, _, _ = pairs[95]
    back = Correction.from_json(with_reg.to_json())
    assert back.with_regression
    out, src = apply_to(back, prop.keypoints, prop.confidence, None, reg, ["model"] * 17, prop.signals)
    assert src[13] == "adapted"
    assert np.hypot(*(out[13, :2] - truth[13, :2])) < 0.5 * np.hypot(*(prop.keypoints[13, :2] - truth[13, :2]))
    raw, raw_src = apply_to(back, prop.keypoints, prop.confidence, None, reg, ["model"] * 17, None)
    assert np.array_equal(raw, prop.keypoints) and set(raw_src) == {"model"}


def _bent_knee(seed, groups, n_per=30):
    """Invented test data with an error that is not linear in the proposal: the knee (joint 13)
    is proposed too high by an amount that grows with the square of feature 0 (say, how bent
    the leg is), so its mean over frames is far from zero at both ends and zero in the middle."""
    s = _synthetic(n_per=n_per, seed=seed, groups=groups, offset=(0.0, 0.0), noise=0.003)
    rng = np.random.default_rng(seed + 50)
    bend = rng.uniform(-1, 1, len(s.X))
    # as with real poses, the features move together: here along one direction with the bend
    s.X[:] = np.outer(bend, np.random.default_rng(99).normal(0, 0.3, s.X.shape[1])) + \
        rng.normal(0, 0.01, s.X.shape)
    s.R[:, 13, 1] += 0.2 * bend ** 2 - 0.07
    return s


def test_kernel_ridge_learns_an_error_that_is_not_linear_in_the_proposal():
    """Kernel ridge (Saunders et al. 1998) can fit a quadratic dependence that no linear map of
    the features can; cross-validation picks it for that joint and it carries over to new people."""
    train = _bent_knee(1, ("A", "B", "C", "D", "E"))
    test = _bent_knee(2, ("F", "G"))
    linear = fit_correction(train, SIG, gammas=())
    both = fit_correction(train, SIG)
    assert both.use[13] and both.kind[13] == "rbf"
    err = lambda c: np.abs(test.R[:, 13, 1] - c.predict_residual(test.X, 17)[:, 13, 1]).mean()  # noqa: E731
    raw = np.abs(test.R[:, 13, 1]).mean()
    assert err(both) < 0.5 * err(linear) and err(both) < 0.3 * raw
    # saved and loaded, the kernel correction predicts the same
    back = Correction.from_json(both.to_json())
    np.testing.assert_allclose(back.predict_residual(test.X, 17), both.predict_residual(test.X, 17),
                               atol=1e-9)
    assert back.kind == both.kind and back.gamma == both.gamma


def test_kernel_ridge_dual_solution_matches_the_closed_form():
    """The dual kernel ridge fit equals the textbook solution alpha = (K + lam I)^-1 (y - mean),
    and with a linear kernel its predictions equal primal ridge on centred features (the
    identity W = Z^T alpha of Saunders et al. 1998)."""
    from kinemark.core.adapt import kernel_ridge_fit, rbf_kernel
    rng = np.random.default_rng(4)
    Z = rng.normal(size=(30, 5))
    Z -= Z.mean(axis=0)
    Y = rng.normal(size=(30, 2))
    alpha, ym = kernel_ridge_fit(Z @ Z.T, Y, 0.7)
    W = np.linalg.solve(Z.T @ Z + 0.7 * np.eye(5), Z.T @ (Y - Y.mean(axis=0)))
    np.testing.assert_allclose(Z @ Z.T @ alpha, Z @ W, atol=1e-10)
    np.testing.assert_allclose(ym, Y.mean(axis=0))
    K = rbf_kernel(Z, Z, 0.5)
    d2 = ((Z[:, None] - Z[None]) ** 2).sum(-1)
    np.testing.assert_allclose(K, np.exp(-0.5 * d2 / 5), atol=1e-12)


def test_no_trim_keeps_every_frame_even_when_most_labels_are_the_proposal():
    """When the annotator kept most proposed points as they were (residual exactly 0 on most
    frames, as the simulated annotator does), the median residual is 0; the untrimmed fit must
    still see the frames where the point was moved, and learn their offset."""
    train = _synthetic(seed=11, groups=("A", "B", "C", "D", "E"), offset=(0.0, 0.0), noise=0.0)
    test = _synthetic(seed=12, groups=("F", "G"), offset=(0.0, 0.0), noise=0.0)
    for s in (train, test):
        moved = s.X[:, 0] > 0.15                 # about a third of the frames
        s.R[:, 9] = 0.0
        s.R[moved, 9] = (0.05, 0.0)
    corr = fit_correction(train, SIG, trims=(float("inf"),), gammas=())
    assert corr.use[9]
    pred = corr.predict_residual(test.X, 17)[:, 9, 0]
    moved = test.X[:, 0] > 0.15
    assert pred[moved].mean() > pred[~moved].mean() + 0.01


def test_kernel_cross_validation_with_a_shared_decomposition_matches_direct_solves():
    """The eigendecomposition shared by joints and penalties gives the same held-out gains as
    solving (K + lam I) alpha = y - mean for each joint, fold and penalty on its own."""
    from kinemark.core.adapt import _folds, _joint_sim, _kernel_cv, kernel_ridge_fit, sq_distances
    s = _bent_knee(3, ("A", "B", "C", "D"), n_per=12)
    s.R[:5, 15] = np.nan                         # one joint with fewer labelled frames
    Z = (s.X - s.X.mean(0)) / s.X.std(0)
    d2 = sq_distances(Z, Z) / Z.shape[1]
    folds = _folds(s.groups)
    var = (2 * SIG) ** 2
    got = _kernel_cv(s, folds, d2, (0.1, 1.0), (0.1, 10.0), var)
    for j in (13, 15):
        ok = np.isfinite(s.R[:, j]).all(1)
        c = 0
        for g in (0.1, 1.0):
            for lam in (0.1, 10.0):
                for f, test in enumerate(folds):
                    tr, te = ok & ~test, ok & test
                    alpha, ym = kernel_ridge_fit(np.exp(-g * d2[np.ix_(tr, tr)]), s.R[tr, j], lam)
                    pred = np.exp(-g * d2[np.ix_(te, tr)]) @ alpha + ym
                    want = _joint_sim(s.R[te, j] - pred, s.area[te], var[j]) - _joint_sim(s.R[te, j], s.area[te], var[j])
                    np.testing.assert_allclose(got[j][c][f], want, atol=1e-9)
                c += 1


def test_kernel_on_the_pose_alone_when_other_features_are_noise():
    """An isotropic kernel weighs every feature alike; when the appearance features carry
    nothing about the error, the pose-only view (the first 2K columns, every joint's crop
    x, y) is what cross-validation picks, and it predicts better than the all-feature view."""
    def noisy(seed, groups):
        s = _bent_knee(seed, groups)
        extra = np.random.default_rng(seed + 7).normal(size=(len(s.X), 80))   # an uninformative embedding
        return Samples(np.hstack([s.X, extra]), s.R, s.groups, s.area, s.vis)
    train, test = noisy(1, ("A", "B", "C", "D", "E")), noisy(2, ("F", "G"))
    both = fit_correction(train, SIG)
    only_all = fit_correction(train, SIG, views=("all",))
    assert both.use[13] and both.kind[13] == "rbf" and both.models[13][5] == "pose"
    err = lambda c: np.abs(test.R[:, 13, 1] - c.predict_residual(test.X, 17)[:, 13, 1]).mean()  # noqa: E731
    assert err(both) < 0.7 * err(only_all)
    back = Correction.from_json(both.to_json())
    np.testing.assert_allclose(back.predict_residual(test.X, 17), both.predict_residual(test.X, 17), atol=1e-9)


def test_the_cross_validation_counts_keypoints_brought_within_the_move_threshold():
    """The score weighs a held-out keypoint crossing the move threshold (OKS similarity 0.5,
    the demo's and benchmark's definition of a joint to move) far above the same gain in
    similarity well inside it, yet still counts the latter."""
    from kinemark.core.adapt import MOVE_SIMILARITY, _objective
    s = np.array([MOVE_SIMILARITY - 0.05, MOVE_SIMILARITY + 0.05, 0.85, 0.95])
    f = _objective(s)
    assert np.all(np.diff(_objective(np.linspace(0, 1, 101))) > 0)
    crossing, inside = f[1] - f[0], f[3] - f[2]
    assert crossing > 5 * inside > 0


def test_a_refit_that_keeps_the_raw_model_takes_back_the_earlier_correction(project, video):
    """Frames still holding an earlier correction's untouched points go back to the raw
    proposal when a refit finds no correction worth keeping; frames a person touched do not."""
    from kinemark.core import ops
    from kinemark.core.adapt import fit_project
    from kinemark.core.media import Sampling
    from kinemark.core.model import ACCEPTED, PREFILLED
    ops.add_media(project, [video], sampling=Sampling(every=10), participant="QB-01")
    s = project.store
    fids = [f.id for f in s.frames()][:4]
    rng = np.random.default_rng(0)
    region = {"cx": 80.0, "cy": 60.0, "w": 100.0, "h": 100.0, "angle": 0.0}
    raw = {}
    for fid in fids:
        k = np.column_stack([rng.uniform(40, 120, 17), rng.uniform(20, 100, 17), np.full(17, 2.0)])
        raw[fid] = k
        s.save_proposal(fid, model_id="m", model_hash="a" * 64, keypoints=k, confidence=np.full(17, 0.9),
                        signals={}, score=0.9, region=region)
    labelled = raw[fids[0]].copy()
    labelled[:, :2] += 1.0
    s.save_annotation(fids[0], labelled, ["human"] * 17, state=ACCEPTED)
    earlier = raw[fids[1]].copy()
    earlier[9, :2] += 6.0                                  # an earlier correction moved the left wrist
    s.save_annotation(fids[1], earlier, ["model"] * 9 + ["adapted"] + ["model"] * 7, state=PREFILLED)
    touched = raw[fids[2]].copy()
    touched[9, :2] += 6.0
    s.save_annotation(fids[2], touched, ["model"] * 9 + ["human"] + ["model"] * 7, state=PREFILLED)
    ch, corr = fit_project(project)
    assert not corr.active and "went back to the raw proposal" in ch.message
    back = s.annotation(fids[1])
    np.testing.assert_allclose(back.keypoints, raw[fids[1]])
    assert set(back.sources) == {"model"}
    np.testing.assert_allclose(s.annotation(fids[2]).keypoints, touched)     # a person's point stays


def test_a_refit_never_overwrites_a_save_made_while_it_ran(project, video, monkeypatch):
    """In team mode an annotator may save a frame while a refit re-proposes the untouched
    ones: the refit must check each write against the version it read (as a person's save
    is checked) and leave that person's save in place."""
    from kinemark.core import ops
    from kinemark.core.adapt import fit_project
    from kinemark.core.media import Sampling
    from kinemark.core.model import ACCEPTED, PREFILLED
    ops.add_media(project, [video], sampling=Sampling(every=10), participant="QB-01")
    s = project.store
    fids = [f.id for f in s.frames()][:3]
    rng = np.random.default_rng(1)
    region = {"cx": 80.0, "cy": 60.0, "w": 100.0, "h": 100.0, "angle": 0.0}
    raw = {}
    for fid in fids:
        k = np.column_stack([rng.uniform(40, 120, 17), rng.uniform(20, 100, 17), np.full(17, 2.0)])
        raw[fid] = k
        s.save_proposal(fid, model_id="m", model_hash="a" * 64, keypoints=k, confidence=np.full(17, 0.9),
                        signals={}, score=0.9, region=region)
    s.save_annotation(fids[0], raw[fids[0]] + [1.0, 1.0, 0.0], ["human"] * 17, state=ACCEPTED)
    earlier = raw[fids[1]].copy()
    earlier[9, :2] += 6.0                       # an earlier correction's point: the refit takes it back
    s.save_annotation(fids[1], earlier, ["model"] * 9 + ["adapted"] + ["model"] * 7, state=PREFILLED)
    theirs = earlier.copy()
    theirs[9, :2] += 3.0
    real = s.proposal

    def annotator_saves_first(frame_id, **kw):  # between the refit's read and its write
        if frame_id == fids[1]:
            s.save_annotation(fids[1], theirs, ["model"] * 9 + ["human"] + ["model"] * 7, state=PREFILLED)
        return real(frame_id, **kw)

    monkeypatch.setattr(s, "proposal", annotator_saves_first)
    ch, corr = fit_project(project)
    kept = s.annotation(fids[1])
    np.testing.assert_allclose(kept.keypoints, theirs)
    assert kept.sources[9] == "human"
    assert "1 frame(s) saved by someone during the fit were left as they saved them" in ch.message
