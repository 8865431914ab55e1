"""The headless main job end to end, on the tiny size of the invented scenario."""
import json

import numpy as np
import pytest

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
