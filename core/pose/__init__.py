"""Pose models: adapters, crops, heatmap decoding, uncertainty signals.

:func:`load_adapter` picks the project's model: the bundled BlazePose GHUM
landmark model unless the project's ``pose_model`` setting names a team's own
ONNX heatmap model (a ``.onnx`` file with its ``.kinemark.json`` description).
"""
from __future__ import annotations

from pathlib import Path

from ..errors import KinemarkError
from .base import PoseAdapter, PoseResult, Region

BUNDLED = "bundled"


def load_adapter(project, *, threads: int = 2, tuned: bool = True, **options) -> PoseAdapter:
    """The project's pose model, loaded; a clear KinemarkError when it cannot be.

    ``tuned``: with the project's tuning of the bundled model's heatmap decoder, when it has one
    (core.tuning); False for the model as shipped."""
    spec = project.store.get_meta("pose_model", BUNDLED)
    if tuned and spec in (None, "", BUNDLED):
        from ..tuning import stored_tuning
        t = stored_tuning(project)
        if t is not None:
            options["tuning"] = t
    return adapter_for(spec, project.skeleton, threads=threads, root=project.root, **options)


def adapter_for(spec: str, skeleton, *, threads: int = 2, root: Path | None = None, **options) -> PoseAdapter:
    if spec in (None, "", BUNDLED):
        from .landmark import LandmarkAdapter
        return LandmarkAdapter(skeleton, threads=threads, **options)
    path = Path(spec)
    if not path.is_absolute() and root is not None:
        path = Path(root) / path
    if path.suffix.lower() != ".onnx":
        raise KinemarkError(f"the pose model must be 'bundled' or an .onnx file, not {spec!r}")
    from .heatmap import HeatmapAdapter
    return HeatmapAdapter(path, skeleton, threads=threads)


__all__ = ["PoseAdapter", "PoseResult", "Region", "load_adapter", "adapter_for", "BUNDLED"]
