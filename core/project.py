"""The open project: its folder, its store, where its media live, and frame access.

No global state: every operation takes the Project it works on.
"""
from __future__ import annotations

import getpass
import json
import os
import re
from pathlib import Path

import numpy as np

from .errors import KinemarkError
from .media import FrameCache, FrameSource, file_sha256
from .model import Media, User
from .skeleton import Skeleton
from .store import DB_NAME, Store


TEAM_FILE = "team.json"


def _schema_from_folder(root: Path) -> str:
    name = re.sub(r"[^a-z0-9_]+", "_", Path(root).resolve().name.lower()).strip("_") or "project"
    if not name[0].isalpha():
        name = "p_" + name
    return name[:63]


def _write_private(path: Path, text: str):
    fd = os.open(str(path), os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    with os.fdopen(fd, "w", encoding="utf-8") as f:
        f.write(text)


def _default_user_name() -> str:
    try:
        return getpass.getuser() or "owner"
    except Exception:
        return "owner"


def _make_folder(root: Path):
    """The project folder and any missing parents, or a one-line reason why not."""
    try:
        root.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise KinemarkError(f"cannot create the project folder {root}: {e.strerror}") from None


class Project:
    def __init__(self, root: Path, store: Store):
        self.root = Path(root).resolve()
        self.store = store
        self.cache = FrameCache()
        self._sources: dict[int, FrameSource] = {}
        self._skeleton: tuple[int, Skeleton] | None = None

    # ---- lifecycle ----------------------------------------------------------------

    @classmethod
    def create(cls, root: str | Path, skeleton: Skeleton, *, owner: str | None = None,
               media_root: str | None = None, db: str | None = None,
               schema: str | None = None) -> "Project":
        """A new project folder. With ``db`` (a PostgreSQL connection string, no password in
        it) the project lives in a schema of that team database; the folder then holds only
        ``team.json`` saying where (the password comes from PGPASSWORD or ~/.pgpass)."""
        root = Path(root)
        if (root / DB_NAME).exists() or (root / TEAM_FILE).exists():
            raise KinemarkError(f"{root} already holds a Kinemark project")
        if root.exists() and not root.is_dir():
            raise KinemarkError(f"{root} exists and is not a folder")
        if db:
            from .store import check_dsn_has_no_password
            check_dsn_has_no_password(db)
            schema = schema or _schema_from_folder(root)
            store = Store.postgres(db, schema, create=True)
            _make_folder(root)
            _write_private(root / TEAM_FILE, json.dumps({"dsn": db, "schema": schema}, indent=2))
        else:
            _make_folder(root)
            try:
                store = Store(root / DB_NAME, create=True)
            except OSError as e:
                raise KinemarkError(f"cannot create the project database in {root}: {e.strerror}") from None
        try:
            owner_user = store.add_user(owner or _default_user_name(), "admin")
            store.add_skeleton(skeleton, user_id=owner_user.id)
            store.set_meta("default_user", owner_user.name, user_id=owner_user.id)
            if media_root:
                store.set_meta("media_root", str(Path(media_root).resolve()), user_id=owner_user.id)
        except BaseException:
            store.close()
            raise
        return cls(root, store)

    @classmethod
    def open(cls, root: str | Path) -> "Project":
        root = Path(root)
        if not root.is_dir():
            raise KinemarkError(f"{root} is not a folder")
        team = root / TEAM_FILE
        if team.exists():
            try:
                conf = json.loads(team.read_text())
                dsn, schema = os.environ.get("KINEMARK_DB") or conf["dsn"], conf["schema"]
            except (OSError, ValueError, KeyError, TypeError) as e:
                raise KinemarkError(f"cannot read the team settings: {e}", where=str(team)) from None
            return cls(root, Store.postgres(dsn, schema))
        db = root / DB_NAME
        if not db.exists():
            raise KinemarkError(f"{root} is not a Kinemark project (no {DB_NAME}); "
                                f"create one with 'kinemark new {root}'")
        return cls(root, Store(db))

    def close(self):
        for s in self._sources.values():
            s.close()
        self._sources.clear()
        self.store.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    # ---- skeleton and users ---------------------------------------------------------

    @property
    def skeleton(self) -> Skeleton:
        if self._skeleton is None:
            self._skeleton = self.store.skeleton()
        return self._skeleton[1]

    def user(self, name: str | None = None) -> User:
        name = name or os.environ.get("KINEMARK_USER") or self.store.get_meta("default_user")
        if name is None:
            raise KinemarkError("no user given and the project has no default user")
        return self.store.user(name)

    # ---- media paths ----------------------------------------------------------------

    @property
    def media_root(self) -> Path | None:
        mr = self.store.get_meta("media_root")
        return Path(mr) if mr else None

    def stored_path(self, path: Path) -> tuple[str, str]:
        """How a media path is stored: relative to the project, else to the media root, else absolute."""
        path = Path(path).resolve()
        for base, root in (("project", self.root), ("media_root", self.media_root)):
            if root is not None:
                try:
                    return path.relative_to(root).as_posix(), base
                except ValueError:
                    pass
        return str(path), "absolute"

    def media_path(self, media: Media) -> Path:
        if media.path_base == "project":
            return self.root / media.path
        if media.path_base == "media_root":
            if self.media_root is None:
                raise KinemarkError("this media is stored relative to a media root, but the project "
                                    "has none configured")
            return self.media_root / media.path
        return Path(media.path)

    # ---- frames -----------------------------------------------------------------------

    def verify_media(self, media: Media) -> Media:
        """Check the file still matches its sha256; mark it changed if not."""
        path = self.media_path(media)
        if not path.exists():
            raise KinemarkError("media file is missing; relink it", where=str(path))
        if file_sha256(path) != media.sha256:
            if media.status != "changed":
                self.store.set_media_status(media.id, "changed")
            raise KinemarkError("the file changed on disk since it was imported; it is refused until "
                                "you relink it ('kinemark relink')", where=str(path))
        return media

    def frame_source(self, media_id: int) -> FrameSource:
        src = self._sources.get(media_id)
        if src is None:
            media = self.store.media(media_id)
            if media.status == "changed":
                raise KinemarkError("the file changed on disk since it was imported; relink it first",
                                    where=media.path)
            self.verify_media(media)
            checks = {f.frame_index: f.pixel_sha for f in self.store.frames(media_id)}
            src = FrameSource(self.media_path(media), media.kind, checks)
            self._sources[media_id] = src
        return src

    def read_frame(self, media_id: int, frame_index: int) -> np.ndarray:
        key = (media_id, frame_index)
        img = self.cache.get(key)
        if img is None:
            img = self.frame_source(media_id).read(frame_index)
            self.cache.put(key, img)
        return img

    def read_frame_id(self, frame_id: int) -> np.ndarray:
        f = self.store.frame(frame_id)
        return self.read_frame(f.media_id, f.frame_index)
