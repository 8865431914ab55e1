"""QA checks: plain functions over arrays and the project runner.

Outside references: the modified z-score and its 3.5 limit are from Iglewicz &
Hoaglin (1993), "How to Detect and Handle Outliers" (ASQC); the left/right pairs are
COCO's keypoint names (left_X / right_X). The swap and geometry heuristics are
Kinemark's own, tested here against poses built by hand.
"""
import numpy as np
import pytest

from kinemark.core import qa, review
from kinemark.core.cli import main
from kinemark.core.errors import KinemarkError
from kinemark.core.skeleton import COCO17

from test_review import H, _frames, _pose, team  # noqa: F401  (shared pose and fixture)

NAMES = list(COCO17.keypoints)
I = {n: i for i, n in enumerate(NAMES)}


def test_outside_image_and_missing_required():
    k = _pose()
    k[I["left_wrist"]] = (-1.0, 50.0, 2)
    k[I["right_wrist"]] = (200.0, 200.0, 1)     # on the border: inside (COCO pixel coordinates)
    k[I["left_ankle"]] = (500.0, 500.0, 0)      # not labelled: never "outside"
    assert qa.outside_image(k, 200, 200).tolist() == [I["left_wrist"]]
    k[I["left_hip"], 2] = 0
    assert qa.missing_required(k, [I["left_hip"], I["right_hip"]]).tolist() == [I["left_hip"]]
    assert qa.missing_required(k, []).tolist() == []


def test_modified_z_score_as_iglewicz_and_hoaglin():
    # Iglewicz & Hoaglin (1993): M_i = 0.6745 (x_i - median) / MAD. Worked by hand:
    # x = 2, 3, 3, 4, 100 -> median 3, |x - 3| = 1, 0, 0, 1, 97 -> MAD 1
    z = qa.modified_z_scores([2, 3, 3, 4, 100])
    np.testing.assert_allclose(z, [-0.6745, 0, 0, 0.6745, 0.6745 * 97])
    assert np.isnan(qa.modified_z_scores([5, 5, 5, 5, 6])).all()      # MAD 0: undefined


def test_bone_length_outlier_limit_is_3_5():
    # Worked by hand: base + [x] with x outside 96..104 has median 100 and absolute
    # deviations 0, 0, 0, 2, 2, 2, 2, 4, 4, |x - 100|, so MAD = 2 and M = 0.6745 (x - 100) / 2;
    # the limit 3.5 lies at |x - 100| = 3.5 * 2 / 0.6745 = 10.38.
    base = [96, 98, 98, 100, 100, 100, 102, 102, 104]
    for x, flagged in ((110.0, False), (111.0, True), (89.0, True), (90.0, False)):
        L = np.array(base + [x], float)[:, None]
        z, fl = qa.bone_length_outliers(L, min_relative=0.0)
        assert z[-1, 0] == pytest.approx(0.6745 * (x - 100) / 2)
        assert bool(fl[-1, 0]) is flagged, x
    # too few frames: not judged
    z, fl = qa.bone_length_outliers(np.array([[100.0], [100.0], [300.0]]))
    assert np.isnan(z).all() and not fl.any()
    # Kinemark's extra condition: a few pixels of jitter around a tight median are no outlier
    # (median 100.5, MAD 1, so 106 has M = 0.6745 * 5.5 = 3.71 > 3.5, but is only 5.5 % off)
    L = np.array([[99.5], [100.5]] * 5 + [[106.0]])
    assert not qa.bone_length_outliers(L)[1].any()
    assert qa.bone_length_outliers(L, min_relative=0.0)[1][-1, 0]


def test_swap_against_neighbours():
    a, b = _pose(), _pose(4)
    sw = b.copy()
    sw[[I["left_knee"], I["right_knee"]]] = sw[[I["right_knee"], I["left_knee"]]]
    assert qa.swapped_against_neighbours(sw, [a, _pose(8)], COCO17.flip_pairs) == [(I["left_knee"], I["right_knee"])]
    assert qa.swapped_against_neighbours(b, [a, _pose(8)], COCO17.flip_pairs) == []
    # one neighbour says swapped, the other not: no flag
    assert qa.swapped_against_neighbours(sw, [a, sw], COCO17.flip_pairs) == []


def test_mirrored_in_image():
    k = _pose()
    assert qa.mirrored_in_image(k, NAMES, COCO17.flip_pairs) == []
    # facing the camera (nose and both eyes visible), yet the shoulders are mirrored
    m = k.copy()
    m[[I["left_shoulder"], I["right_shoulder"]]] = m[[I["right_shoulder"], I["left_shoulder"]]]
    assert (I["left_shoulder"], I["right_shoulder"]) in qa.mirrored_in_image(m, NAMES, COCO17.flip_pairs)
    # seen from behind (eyes hidden), the whole body's left is on the image-left: no flag
    back = k.copy()
    back[:, 0] = 200 - back[:, 0]
    back[[I["left_eye"], I["right_eye"]], 2] = 0
    assert qa.mirrored_in_image(back, NAMES, COCO17.flip_pairs) == []
    # ... but its knees exchanged against its hips are
    back[[I["left_knee"], I["right_knee"]]] = back[[I["right_knee"], I["left_knee"]]]
    assert qa.mirrored_in_image(back, NAMES, COCO17.flip_pairs) == [(I["left_knee"], I["right_knee"])]
    # crossing the wrists (reaching across the body) is no flag
    reach = back.copy()
    reach[[I["left_knee"], I["right_knee"]]] = reach[[I["right_knee"], I["left_knee"]]]
    reach[[I["left_wrist"], I["right_wrist"]]] = reach[[I["right_wrist"], I["left_wrist"]]]
    assert qa.mirrored_in_image(reach, NAMES, COCO17.flip_pairs) == []


def test_visible_but_absent():
    k = _pose()
    conf = np.full(17, 0.9)
    pres = np.full(17, 0.95)
    pres[I["left_ankle"]] = 0.02
    k[I["right_ankle"], 2] = 1                                 # occluded: not "visible"
    pres[I["right_ankle"]] = 0.01
    assert qa.visible_but_absent(k, conf, pres).tolist() == [I["left_ankle"]]
    conf[I["nose"]] = 0.01                                     # no presence signal: confidence decides
    assert qa.visible_but_absent(k, conf, None).tolist() == [I["nose"]]


def _video_labels(project, poses, user="ann"):
    fids = _frames(project, len(poses))
    for fid, k in zip(fids, poses):
        review.edit(project, fid, k, H, user=user)
    return fids


def test_runner_flags_a_swap_against_neighbouring_frames(project, team):
    poses = [_pose(2 * i) for i in range(5)]
    sw = poses[2]
    sw[[I["left_ankle"], I["right_ankle"]]] = sw[[I["right_ankle"], I["left_ankle"]]]
    fids = _video_labels(project, poses)
    flags = [f for f in qa.run_checks(project) if f.check == "left_right_swap"]
    assert {f.frame_id for f in flags} == {fids[2]}
    assert any(f.keypoints == (I["left_ankle"], I["right_ankle"]) and "neighbouring" in f.message for f in flags)


def test_runner_bone_length_within_a_participant(project, team):
    rng = np.random.default_rng(1)
    poses = [_pose(3 * i) for i in range(8)]
    for k in poses:
        k[:, :2] += rng.normal(0, 1.0, (17, 2))      # a pixel of labelling jitter
    poses[5][I["left_wrist"], 1] += 40        # forearm 28 px -> about 68 px
    fids = _video_labels(project, poses)
    flags = [f for f in qa.run_checks(project) if f.check == "bone_length"]
    assert [(f.frame_id, f.keypoints) for f in flags] == [(fids[5], (I["left_elbow"], I["left_wrist"]))]
    assert "long" in flags[0].message


def test_runner_required_setting_and_model_absent(project, team):
    (fid,) = _video_labels(project, [_pose()])
    k = _pose(); k[I["left_ear"], 2] = 0
    review.edit(project, fid, k, H, user="ann")
    assert qa.run_checks(project) == []
    qa.set_required_keypoints(project, ["left_ear"])
    with pytest.raises(KinemarkError, match="no keypoint 'left_toe'"):
        qa.set_required_keypoints(project, ["left_toe"])
    flags = qa.run_checks(project)
    assert [(f.check, f.severity) for f in flags] == [("required_missing", "error")]
    pres = np.ones(17); pres[I["nose"]] = 0.01
    project.store.save_proposal(fid, model_id="m", model_hash="h", keypoints=_pose(), confidence=np.ones(17),
                                signals={"presence": pres}, score=0.9)
    checks = sorted(f.check for f in qa.run_checks(project))
    assert checks == ["required_missing", "visible_but_absent"]
    with pytest.raises(KinemarkError, match="unknown check"):
        qa.run_checks(project, checks=["spelling"])


def test_check_command_prints_flags(project, team, capsys):
    (fid,) = _video_labels(project, [_pose()])
    k = _pose(); k[I["right_hip"]] = (250.0, 130.0, 2)
    review.edit(project, fid, k, H, user="ann")
    root = project.root
    project.close()
    assert main(["check", str(root)]) == 0
    out = capsys.readouterr().out
    assert "error outside_image: right_hip at (250.0, 130.0)" in out and "1 error(s)" in out
    assert main(["check", str(root), "--strict"]) == 1
    capsys.readouterr()
    assert main(["check", str(root), "--require", "nose,left_thumb"]) == 2
    assert "no keypoint 'left_thumb'" in capsys.readouterr().err
