"""The invented demo-scenario renderer (Quillon Bay Stroke Rehabilitation Clinic).

Seeded, deterministic synthetic clips of seated reach-to-target and
sit-to-stand exercises with exact COCO-17 ground truth. Invented data for the
demo project and for benchmarks only -- never evidence about real patients.

    render_scenario(out_dir, seed=7, size="demo" | "tiny", progress=None) -> list[ClipInfo]
    scenario_clips(seed, size) -> list[Clip]      # Clip.render(i) -> Frame (no disk access)
    render_frame(clip, i) -> (bgr_uint8, keypoints (17, 3), bbox [x, y, w, h])
"""
from .scenario import (SCENARIO_NAME, Clip, ClipInfo, Frame, coco_document, render_frame,
                       render_scenario, scenario_clips)

__all__ = ["SCENARIO_NAME", "Clip", "ClipInfo", "Frame", "coco_document", "render_frame",
           "render_scenario", "scenario_clips"]
