import json

import numpy as np
import pytest

from kinemark.core.errors import KinemarkError
from kinemark.core.skeleton import COCO17, load_skeleton


def test_coco17_sigmas_match_the_reference_evaluator():
    # Source: pycocotools (the reference COCO evaluator), Params.setKpParams.
    from pycocotools.cocoeval import COCOeval
    ref = COCOeval(iouType="keypoints").params.kpt_oks_sigmas
    np.testing.assert_array_equal(COCO17.sigma_array, ref)


def test_coco17_order_and_edges_follow_the_coco_person_category():
    # Source: COCO 2017 person_keypoints annotation files, category "person" (from memory of the
    # published file; the order is also the one documented on cocodataset.org).
    assert COCO17.keypoints[0] == "nose"
    assert COCO17.keypoints[5:7] == ("left_shoulder", "right_shoulder")
    assert COCO17.keypoints[-2:] == ("left_ankle", "right_ankle")
    assert len(COCO17.edges) == 19
    # 1-based [16, 14] is left_ankle-left_knee
    assert (COCO17.keypoints[15], COCO17.keypoints[13]) == ("left_ankle", "left_knee")
    assert COCO17.edges[0] == (15, 13)


def test_flip_permutation_swaps_left_and_right():
    perm = COCO17.flip_permutation()
    for i, name in enumerate(COCO17.keypoints):
        other = COCO17.keypoints[perm[i]]
        if name.startswith("left_"):
            assert other == "right_" + name[5:]
        elif name.startswith("right_"):
            assert other == "left_" + name[6:]
        else:
            assert other == name
    assert (perm[perm] == np.arange(17)).all()


def test_custom_skeleton_from_json(tmp_path):
    f = tmp_path / "s.json"
    f.write_text(json.dumps({"name": "upper", "keypoints": ["nose", "left_wrist", "right_wrist", "chin"],
                             "edges": [["nose", "chin"], [1, 2]]}))
    s = load_skeleton(f)
    assert s.keypoints == ("nose", "left_wrist", "right_wrist", "chin")
    assert s.flip_pairs == ((1, 2),)
    assert s.edges == ((0, 3), (1, 2))
    # COCO sigmas where the name is a COCO keypoint, the documented default otherwise
    assert s.sigmas[1] == pytest.approx(0.062)


@pytest.mark.parametrize("content,field", [
    ('{"name": "x", "keypoints": []}', "keypoints"),
    ('{"keypoints": ["a"]}', "name"),
    ('{"name": "x", "keypoints": ["a", "a"]}', "keypoints"),
    ('{"name": "x", "keypoints": ["a", "b"], "edges": [["a", "zz"]]}', "edges[0][1]"),
    ('{"name": "x", "keypoints": ["a", "b"], "edges": [[0, 5]]}', "edges[0][1]"),
    ('{"name": "x", "keypoints": ["a", "b"], "edges": [["a"]]}', "edges[0]"),
    ('{"name": "x", "keypoints": ["a", "b"], "sigmas": [0.1]}', "sigmas"),
    ('{"name": "x", "keypoints": ["a", "b"], "sigmas": [0.1, -1]}', "sigmas[1]"),
    ('{"name": "x", "keypoints": ["a", 3]}', "keypoints[1]"),
])
def test_malformed_skeleton_names_the_field(tmp_path, content, field):
    f = tmp_path / "bad.json"
    f.write_text(content)
    with pytest.raises(KinemarkError) as e:
        load_skeleton(f)
    assert f"field '{field}'" in str(e.value)


def test_skeleton_not_json(tmp_path):
    f = tmp_path / "bad.json"
    f.write_text("{name: ")
    with pytest.raises(KinemarkError, match="not valid JSON"):
        load_skeleton(f)


def test_unknown_skeleton_name():
    with pytest.raises(KinemarkError, match="built in: coco17"):
        load_skeleton("body25")
