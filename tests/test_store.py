import sqlite3

import numpy as np
import pytest

from kinemark.core import store as store_mod
from kinemark.core.errors import KinemarkError
from kinemark.core.model import ACCEPTED, DRAFTING
from kinemark.core.project import Project
from kinemark.core.skeleton import COCO17
from kinemark.core.store import DB_NAME, Store


def _frame(project):
    m, fids = project.store.add_media(session_id=None, kind="image", path="a.png", path_base="project",
                                      sha256="ab" * 32, fps=None, frame_count=1, width=100, height=80,
                                      frames=[(0, None, "x")])
    return fids[0]


def _kps(seed=0):
    rng = np.random.default_rng(seed)
    return np.column_stack([rng.uniform(0, 100, 17), rng.uniform(0, 80, 17), np.full(17, 2)])


def test_pragmas_and_schema(project):
    db = project.store._db
    assert db.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    assert db.execute("PRAGMA foreign_keys").fetchone()[0] == 1
    assert project.store.version() == store_mod.schema_version()
    assert project.store.integrity_check() == "ok"


def test_foreign_keys_enforced(project):
    with pytest.raises(KinemarkError, match="no frame 9999"):
        project.store.save_annotation(9999, _kps(), ["human"] * 17, state=DRAFTING)
    with pytest.raises(sqlite3.IntegrityError, match="FOREIGN KEY"):   # and the database itself refuses
        project.store._db.execute("INSERT INTO frames(media_id, frame_index, pixel_sha) VALUES (77, 0, 'x')")


def test_edit_and_its_event_are_one_transaction(project, monkeypatch):
    fid = _frame(project)
    n_events = len(project.store.events())
    # make the event insert fail: the annotation must not be kept either
    real = Store._event

    def boom(*a, **k):
        raise RuntimeError("disk full")
    monkeypatch.setattr(Store, "_event", staticmethod(boom))
    with pytest.raises(RuntimeError):
        project.store.save_annotation(fid, _kps(), ["human"] * 17, state=DRAFTING)
    monkeypatch.setattr(Store, "_event", staticmethod(real))
    assert project.store.annotation(fid) is None
    assert len(project.store.events()) == n_events


def test_event_log_is_append_only(project):
    fid = _frame(project)
    a = project.store.save_annotation(fid, _kps(), ["human"] * 17, state=DRAFTING, user_id=1)
    ev = project.store.events(entity="annotation", entity_id=a.id)
    assert len(ev) == 1 and ev[0].before is None and '"state": "drafting"' in ev[0].after
    with pytest.raises(sqlite3.DatabaseError, match="append-only"):
        project.store._db.execute("UPDATE events SET action='x'")
    with pytest.raises(sqlite3.DatabaseError, match="append-only"):
        project.store._db.execute("DELETE FROM events")


def test_versions_and_optimistic_concurrency(project):
    fid = _frame(project)
    a1 = project.store.save_annotation(fid, _kps(0), ["human"] * 17, state=DRAFTING, user_id=1,
                                       expected_version=0)
    assert a1.version == 1
    a2 = project.store.save_annotation(fid, _kps(1), ["human"] * 17, state=DRAFTING, user_id=1,
                                       expected_version=1)
    assert a2.version == 2
    with pytest.raises(KinemarkError, match="changed by ra1"):
        project.store.save_annotation(fid, _kps(2), ["human"] * 17, state=DRAFTING, expected_version=1)
    np.testing.assert_array_equal(project.store.annotation(fid).keypoints, _kps(1))


def test_v0_points_are_stored_as_coco_zeros(project):
    fid = _frame(project)
    k = _kps(); k[3] = (55.0, 12.0, 0)
    a = project.store.save_annotation(fid, k, ["human"] * 17, state=DRAFTING)
    assert tuple(a.keypoints[3]) == (0.0, 0.0, 0.0)


@pytest.mark.parametrize("bad", ["shape", "visibility", "nan", "source", "state"])
def test_bad_annotation_refused(project, bad):
    fid = _frame(project)
    k, src, state = _kps(), ["human"] * 17, DRAFTING
    if bad == "shape":
        k = k[:5]
    elif bad == "visibility":
        k[0, 2] = 3
    elif bad == "nan":
        k[0, 0] = np.nan
    elif bad == "source":
        src = ["guess"] * 17
    else:
        state = "done"
    with pytest.raises(KinemarkError):
        project.store.save_annotation(fid, k, src, state=state)
    assert project.store.annotation(fid) is None


def test_forward_migration_and_newer_schema_refused(tmp_path):
    p = Project.create(tmp_path / "p", COCO17)
    p.close()
    extra = store_mod.MIGRATIONS + ["ALTER TABLE annotations ADD COLUMN note TEXT;"]
    s = Store(tmp_path / "p" / DB_NAME)
    assert s.migrate(extra) == 1
    assert s.version() == len(extra)
    cols = [r[1] for r in s._db.execute("PRAGMA table_info(annotations)")]
    assert "note" in cols
    assert s.migrate(extra) == 0
    s.close()
    # this code knows fewer migrations than the file has: refuse, do not guess
    with pytest.raises(KinemarkError, match="newer Kinemark"):
        Store(tmp_path / "p" / DB_NAME)


def test_not_a_database(tmp_path):
    d = tmp_path / "p"
    d.mkdir()
    (d / DB_NAME).write_bytes(b"this is not sqlite" * 100)
    with pytest.raises(KinemarkError, match="not a Kinemark project database|cannot open"):
        Project.open(d)


def test_open_missing_project(tmp_path):
    with pytest.raises(KinemarkError, match="not a Kinemark project"):
        Project.open(tmp_path)


def test_state_counts(project):
    fid = _frame(project)
    project.store.save_annotation(fid, _kps(), ["human"] * 17, state=ACCEPTED)
    c = project.store.state_counts()
    assert c[ACCEPTED] == 1 and c["blank"] == 0


def test_database_file_private(project):
    import os
    import stat
    mode = stat.S_IMODE(os.stat(project.root / DB_NAME).st_mode)
    assert mode & 0o077 == 0


# ---- files that are not, or no longer, a healthy project database -------------------------

def _digest(path):
    import hashlib
    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.mark.parametrize("kind", ["empty", "foreign"])
def test_an_empty_or_foreign_database_is_refused_untouched(tmp_path, kind):
    """Opening must not turn another program's SQLite file (or an empty file) into a project:
    the journal-mode switch and the migrations would both write to it."""
    path = tmp_path / DB_NAME
    if kind == "empty":
        path.write_bytes(b"")
    else:
        c = sqlite3.connect(path)
        c.execute("CREATE TABLE appointments (id INTEGER PRIMARY KEY, note TEXT)")
        c.execute("INSERT INTO appointments (note) VALUES ('Quillon Bay, reach practice')")
        c.commit()
        c.close()
    before = _digest(path)
    with pytest.raises(KinemarkError, match="not a Kinemark project database"):
        Store(path)
    with pytest.raises(KinemarkError, match="not a Kinemark project database"):
        Project.open(tmp_path)
    assert _digest(path) == before
    assert not (tmp_path / (DB_NAME + "-wal")).exists()


def test_a_corrupted_database_is_a_user_error_not_an_internal_one(tmp_path):
    p = Project.create(tmp_path / "p", COCO17, owner="ra1")
    for i in range(300):                                   # enough pages to damage some
        p.store.set_meta(f"filler_{i}", "x" * 2000)
    p.close()
    path = tmp_path / "p" / DB_NAME
    data = bytearray(path.read_bytes())
    half = len(data) // 2
    data[half:] = b"\xa5" * (len(data) - half)             # the second half of the file
    path.write_bytes(bytes(data))
    with pytest.raises(KinemarkError, match="database .* is damaged"):
        with Project.open(tmp_path / "p") as q:
            for i in range(300):
                q.store.get_meta(f"filler_{i}")


def test_writing_to_a_read_only_database_is_said_plainly(tmp_path):
    """SQLite's own read-only refusal (a connection opened read-only), through the store's
    connection wrapper: a user error naming the file, not an OperationalError."""
    p = Project.create(tmp_path / "p", COCO17, owner="ra1")
    p.close()
    path = tmp_path / "p" / DB_NAME
    ro = store_mod._SqliteConnection(sqlite3.connect(f"file:{path}?mode=ro", uri=True), path)
    with pytest.raises(KinemarkError, match="read-only"):
        ro.execute("INSERT INTO meta(key, value) VALUES ('x', 'y')")
    with pytest.raises(sqlite3.OperationalError):           # Kinemark's own mistakes stay loud
        ro.execute("SELECT no_such_column FROM meta")
    ro.close()


def test_a_project_on_a_read_only_folder_opens_to_look_at(tmp_path, monkeypatch):
    """An archived project on read-only media: read as it is (SQLite's immutable mode), and
    any change refused with a one-line error. The folder's read-only state is simulated here
    (mounting one needs privileges a test machine may not have); the SQLite side is real."""
    p = Project.create(tmp_path / "p", COCO17, owner="ra1")
    p.store.set_meta("target_frames", "250")
    p.close()
    monkeypatch.setattr(store_mod, "_folder_writable", lambda folder: False)
    with Project.open(tmp_path / "p") as q:
        assert q.store.read_only and q.store.get_meta("target_frames") == "250"
        with pytest.raises(KinemarkError, match="read-only"):
            q.store.set_meta("target_frames", "300")


def test_a_read_only_project_left_open_is_refused_not_read_stale(tmp_path, monkeypatch):
    p = Project.create(tmp_path / "p", COCO17, owner="ra1")
    p.store.set_meta("target_frames", "250")           # still in the journal: p is not closed
    wal = tmp_path / "p" / (DB_NAME + "-wal")
    assert wal.exists() and wal.stat().st_size > 0
    monkeypatch.setattr(store_mod, "_folder_writable", lambda folder: False)
    with pytest.raises(KinemarkError, match="not closed cleanly"):
        Store(tmp_path / "p" / DB_NAME)
    p.close()
