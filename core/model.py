"""Domain records. The store returns these, never rows.

Keypoints are (K, 3) float arrays: x, y in frame pixels, v in COCO's sense
(0 not labelled / not in frame, 1 labelled but occluded, 2 labelled and visible).
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

# Annotation states: Kinemark's own names for the life of one person's
# keypoints on one frame. A frame with no annotation row is "blank".
BLANK = "blank"              # nothing yet (implicit: no row)
PREFILLED = "prefilled"      # the model's proposal, untouched by a person
DRAFTING = "drafting"        # a person is working on it
IN_REVIEW = "in_review"      # handed to the reviewer
ACCEPTED = "accepted"        # the reviewer accepted it: the only state exported by default
RETURNED = "returned"        # the reviewer sent it back with notes
STATES = (PREFILLED, DRAFTING, IN_REVIEW, ACCEPTED, RETURNED)
# states in which a person has put their own labels on the frame (the poses novelty is measured
# against; the labels QA and agreement look at)
LABELLED_STATES = (DRAFTING, IN_REVIEW, RETURNED, ACCEPTED)

# Where each point came from.
SOURCES = ("model", "adapted", "human", "propagated", "imported")

ROLES = ("annotator", "reviewer", "admin")


@dataclass(frozen=True)
class Participant:
    id: int
    code: str


@dataclass(frozen=True)
class Session:
    id: int
    participant_id: int
    number: int


@dataclass(frozen=True)
class Media:
    id: int
    session_id: int | None
    kind: str            # "video" | "image"
    path: str            # as stored: relative to path_base
    path_base: str       # "project" | "media_root" | "absolute"
    sha256: str
    fps: float | None
    frame_count: int
    width: int
    height: int
    status: str          # "ok" | "changed" (file on disk no longer matches sha256)
    participant_code: str | None = None
    session_number: int | None = None

    @property
    def display_name(self) -> str:
        return self.path.replace("\\", "/").rsplit("/", 1)[-1]


@dataclass(frozen=True)
class Frame:
    id: int
    media_id: int
    frame_index: int
    timestamp: float | None
    pixel_sha: str


@dataclass(frozen=True, eq=False)
class Annotation:
    id: int
    frame_id: int
    person: int
    keypoints: np.ndarray            # (K, 3)
    sources: tuple[str, ...]         # one per keypoint
    state: str
    version: int
    bbox: tuple[float, float, float, float] | None
    updated_by: int | None
    updated_at: str | None


@dataclass(frozen=True)
class User:
    id: int
    name: str
    role: str


@dataclass(frozen=True)
class Event:
    id: int
    at: str
    user_id: int | None
    action: str
    entity: str
    entity_id: int | None
    before: str | None   # JSON
    after: str | None    # JSON


@dataclass(frozen=True, eq=False)
class Proposal:
    id: int
    frame_id: int
    person: int
    model_id: str
    model_hash: str
    keypoints: np.ndarray            # (K, 3) in frame pixels
    confidence: np.ndarray           # (K,)
    signals: dict = field(default_factory=dict)   # name -> (K,) array
    score: float = 0.0
    region: dict | None = None
    embedding: np.ndarray | None = None
    adapted: bool = False
    created_at: str | None = None


@dataclass(frozen=True)
class Changes:
    """What an operation changed, so a front end knows what to refresh.

    Every ``core.ops`` function that mutates the project returns one.
    """

    media: tuple[int, ...] = ()
    frames: tuple[int, ...] = ()
    annotations: tuple[int, ...] = ()
    proposals: tuple[int, ...] = ()
    skeleton: bool = False
    message: str = ""
    details: dict = field(default_factory=dict)

    def merged(self, other: "Changes") -> "Changes":
        return Changes(
            media=self.media + other.media, frames=self.frames + other.frames,
            annotations=self.annotations + other.annotations,
            proposals=self.proposals + other.proposals,
            skeleton=self.skeleton or other.skeleton,
            message="; ".join(m for m in (self.message, other.message) if m),
            details={**self.details, **other.details})


# ---- review and agreement records -------------------------------------------------------

@dataclass(frozen=True)
class ReviewNote:
    """A reviewer's note on one annotation, pinned to a keypoint (or to the whole pose)."""

    id: int
    annotation_id: int
    keypoint: int | None          # skeleton index; None: about the pose as a whole
    text: str
    author_id: int | None
    created_at: str
    addressed_at: str | None = None   # set when the annotator resubmits
    addressed_by: int | None = None


@dataclass(frozen=True, eq=False)
class SecondLabel:
    """An agreement label: a second annotator's keypoints on a frame, blind to the first."""

    id: int
    frame_id: int
    person: int
    keypoints: np.ndarray          # (K, 3)
    labelled_by: int
    version: int
    created_at: str
    updated_at: str
