"""The export bundle: participant split, COCO per split, manifest, tables, de-identification.

Outside references: pycocotools (the reference COCO reader) loads every split; the PNG
chunk layout (length, type, data, CRC; the W3C PNG specification / ISO/IEC 15948) is
used to insert a metadata chunk into a source image and to list the chunks of every
exported image; OpenCV draws and reads the test pictures.
"""
import contextlib
import hashlib
import io
import json
import os
import stat
import struct
import zlib

import cv2
import numpy as np
import pytest

from conftest import write_image
from kinemark.core import export, ops, review
from kinemark.core.cli import main
from kinemark.core.errors import KinemarkError
from kinemark.core.model import ACCEPTED
from kinemark.core.project import Project
from kinemark.core.skeleton import COCO17

from test_review import H, _pose

ANN, REV = "annotator_mira", "reviewer_olufemi"
I = {n: i for i, n in enumerate(COCO17.keypoints)}


def _pose_in(size, dx=0.0):
    k = _pose(dx)
    k[:, 0] *= size[0] / 200
    k[:, 1] *= size[1] / 200
    return k


def _label(p, fid, k, bbox=None):
    review.edit(p, fid, k, H, user=ANN, bbox=bbox)
    a = p.store.annotation(fid)
    review.submit(p, a.id, user=ANN)
    review.accept(p, a.id, user=REV)


def _png_with_text(path, key, text):
    """Insert a tEXt chunk after IHDR (PNG specification: length, type, data, CRC-32 of type+data)."""
    data = path.read_bytes()
    body = key.encode("latin-1") + b"\0" + text.encode("latin-1")
    chunk = struct.pack(">I", len(body)) + b"tEXt" + body + struct.pack(">I", zlib.crc32(b"tEXt" + body))
    ihdr_end = 8 + 4 + 4 + 13 + 4
    path.write_bytes(data[:ihdr_end] + chunk + data[ihdr_end:])


def _png_chunks(data: bytes):
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    pos, out = 8, []
    while pos < len(data):
        n, = struct.unpack(">I", data[pos:pos + 4])
        out.append(data[pos + 4:pos + 8].decode("latin-1"))
        pos += 12 + n
    return out


@pytest.fixture
def study(tmp_path):
    """Five invented participants of the Quillon Bay clinic, two accepted frames each."""
    p = Project.create(tmp_path / "proj", COCO17, owner="admin_tobias")
    p.store.add_user(ANN, "annotator")
    p.store.add_user(REV, "reviewer")
    size = (160, 120)
    info = []
    for n in range(5):
        code = f"QB-{n + 1:02d}"
        folder = tmp_path / "clinic_share" / f"Quillfeather_Marisol_{n + 1:02d}"
        folder.mkdir(parents=True)
        files = [write_image(folder / f"visit_2025-03-1{n}_reach_{j}.png", size=size, seed=10 * n + j)
                 for j in range(2)]
        if n == 0:
            _png_with_text(files[0], "Comment", "Marisol Quillfeather captured 2025-03-10")
        ch, _ = ops.add_media(p, files, participant=code)
        for j, fid in enumerate(ch.frames):
            _label(p, fid, _pose_in(size, dx=j))
        info.append({"code": code, "folder": folder, "files": files, "frames": list(ch.frames)})
    # one more frame still being drafted: never exported by default
    extra = write_image(tmp_path / "clinic_share" / "Quillfeather_Marisol_01" / "draft_take.png", size=size, seed=99)
    ch, _ = ops.add_media(p, [extra], participant="QB-01")
    review.edit(p, ch.frames[0], _pose_in(size), H, user=ANN)
    yield p, info
    p.close()


def _all_files(root):
    return [q for q in root.rglob("*") if q.is_file()]


def _coco(path):
    from pycocotools.coco import COCO
    with contextlib.redirect_stdout(io.StringIO()):
        return COCO(str(path))


def test_split_by_participant_loads_in_pycocotools(study, tmp_path):
    p, info = study
    out = tmp_path / "bundle"
    ch = export.export_bundle(p, out, ratios=(0.6, 0.2, 0.2), seed=3)
    man = json.loads((out / "manifest.json").read_text())
    seen_images = 0
    part_split = {}
    for split in export.SPLITS:
        gt = _coco(out / split / f"coco_{split}.json")           # the reference reader loads it
        imgs = gt.loadImgs(gt.getImgIds())
        seen_images += len(imgs)
        for im in imgs:
            assert (out / split / im["file_name"]).is_file()    # frames next to the JSON
            assert len(gt.getAnnIds(imgIds=[im["id"]])) == 1
        for code in man["splits"][split]["participants"]:
            assert code not in part_split, f"{code} in two splits"
            part_split[code] = split
    assert seen_images == 10 == man["counts"]["images"]             # the draft is not exported
    assert sorted(part_split) == [d["code"] for d in info]
    assert [man["counts"]["splits"][s]["participants"] for s in export.SPLITS] == [3, 1, 1]
    import pandas as pd
    df = pd.read_csv(out / "tables" / "keypoints.csv")
    assert list(df.columns[:5]) == ["split", "image_id", "frame", "participant", "person"]
    assert {"keypoint", "x", "y", "visibility", "source", "annotator", "reviewer", "state"} <= set(df.columns)
    assert len(df) == 10 * 17 and set(df.state) == {ACCEPTED}
    assert set(df.annotator) == {ANN} and set(df.reviewer) == {REV}
    assert df.groupby("participant").split.nunique().max() == 1     # no participant in two splits
    for code, split in part_split.items():
        assert set(df[df.participant == code].split) == {split}
    assert "wrote 10 annotations" in ch.message


def test_split_is_seeded(study):
    keys = [f"QB-{i:02d}" for i in range(1, 21)]
    a = export.split_participants(keys, (0.7, 0.15, 0.15), seed=1)
    assert a == export.split_participants(list(reversed(keys)), (0.7, 0.15, 0.15), seed=1)
    assert any(export.split_participants(keys, (0.7, 0.15, 0.15), seed=s) != a for s in range(2, 6))
    assert sorted(a.values()).count("train") == 14
    assert export.allocate(10, (0.7, 0.15, 0.15)) == [7, 2, 1]
    assert export.allocate(3, (0.7, 0.15, 0.15)) == [1, 1, 1]
    assert export.allocate(2, (0.7, 0.15, 0.15)) == [2, 0, 0]
    with pytest.raises(KinemarkError, match="add up to 1"):
        export.check_ratios((0.5, 0.2, 0.2))
    with pytest.raises(KinemarkError, match="non-negative"):
        export.check_ratios((1.2, -0.2, 0.0))


def test_manifest_hashes_every_file_and_files_are_private(study, tmp_path):
    p, _ = study
    out = tmp_path / "bundle"
    export.export_bundle(p, out)
    man = json.loads((out / "manifest.json").read_text())
    listed = {f["path"]: f for f in man["files"]}
    on_disk = {q.relative_to(out).as_posix() for q in _all_files(out)} - {"manifest.json"}
    assert set(listed) == on_disk
    for rel, f in listed.items():
        data = (out / rel).read_bytes()
        assert hashlib.sha256(data).hexdigest() == f["sha256"] and len(data) == f["bytes"]
    for q in [out, *out.rglob("*")]:
        mode = stat.S_IMODE(os.stat(q).st_mode)
        assert mode == (0o700 if q.is_dir() else 0o600), q
    assert man["tool"]["name"] == "kinemark" and man["skeleton"]["keypoints"] == list(COCO17.keypoints)
    assert man["settings"]["split_unit"] == "participant" and man["settings"]["seed"] == 0
    assert "models" in man and man["counts"]["annotations"] == 10
    # the export is in the audit trail
    assert any(e.action == "export" and e.entity == "bundle" for e in p.store.events())


def test_bundle_refuses_unsafe_targets(study, tmp_path):
    p, _ = study
    (tmp_path / "full").mkdir()
    (tmp_path / "full" / "keep.txt").write_text("x")
    with pytest.raises(KinemarkError, match="not empty"):
        export.export_bundle(p, tmp_path / "full")
    with pytest.raises(KinemarkError, match="folder, not a .json"):
        export.export_bundle(p, tmp_path / "b.json")
    b = export._Bundle(tmp_path / "full")
    for bad in ("../escape.png", "/etc/passwd", "a/../../escape.png"):
        with pytest.raises(KinemarkError, match="leave the export folder"):
            b.path(bad)
    with pytest.raises(KinemarkError, match="nothing to export"):
        export.export_bundle(p, tmp_path / "none", states=["returned"])


def test_parquet_table_when_pyarrow_is_installed(study, tmp_path):
    pytest.importorskip("pyarrow")
    import pandas as pd
    p, _ = study
    export.export_bundle(p, tmp_path / "bundle")
    a = pd.read_csv(tmp_path / "bundle" / "tables" / "keypoints.csv")
    b = pd.read_parquet(tmp_path / "bundle" / "tables" / "keypoints.parquet")
    pd.testing.assert_frame_equal(a, b, check_dtype=False)


def test_deidentified_bundle_holds_no_original_name_path_or_date(study, tmp_path):
    p, info = study
    out = tmp_path / "bundle"
    ch = export.export_bundle(p, out, deidentify=True, seed=1)
    needles = {str(p.root), str(tmp_path), "clinic_share", "Quillfeather", "2025-03-1", "draft_take",
               ANN, REV, "admin_tobias"}
    for d in info:
        needles |= {d["code"], d["folder"].name}
        needles |= {f.stem for f in d["files"]} | {f.name for f in d["files"]}
    files = _all_files(out)
    assert len(files) > 10
    for q in files:
        data = q.read_bytes()
        for s in needles:
            assert s.encode("utf-8") not in data, f"{s!r} found in {q.relative_to(out)}"
        assert not [s for s in needles if s in q.relative_to(out).as_posix()]
        if q.suffix == ".png":
            # re-encoded pixels only: no text, time or EXIF chunk (PNG specification chunk types)
            assert set(_png_chunks(data)) == {"IHDR", "IDAT", "IEND"}, q
    man = json.loads((out / "manifest.json").read_text())
    deid = man["deidentification"]
    assert deid["caution"] == export.DEID_CAUTION and "must check" in export.DEID_CAUTION
    assert any("file names" in r for r in deid["removed"]) and deid["not_removed"]
    assert deid["faces_blurred_from_face_points"] == 10
    assert "must check" in ch.message and "must check" in (out / "README.txt").read_text()
    # participants are still kept apart in the pseudonymous bundle
    import pandas as pd
    df = pd.read_csv(out / "tables" / "keypoints.csv")
    assert df.groupby("participant").split.nunique().max() == 1 and df.participant.nunique() == 5
    assert not {"media", "media_id", "frame_index", "timestamp"} & set(df.columns)
    # the way back to the project is in the project's own event log only
    ev = [e for e in p.store.events() if e.action == "export"][-1]
    assert "QB-01" in ev.after


def _checker(img, cx, cy, r):
    """A high-variance patch (2-pixel black and white checkerboard) of radius r at (cx, cy)."""
    yy, xx = np.mgrid[0:img.shape[0], 0:img.shape[1]]
    sel = (np.abs(xx - cx) <= r) & (np.abs(yy - cy) <= r)
    img[sel] = np.where((((xx[sel] // 2) + (yy[sel] // 2)) % 2)[:, None] == 0, 0, 255)


def _local_var(img, x, y, r=3):
    g = cv2.cvtColor(img, cv2.COLOR_BGR2GRAY).astype(float)
    x, y = int(round(x)), int(round(y))
    return float(g[y - r:y + r + 1, x - r:x + r + 1].var())


def test_blur_covers_the_face_of_every_person(tmp_path):
    p = Project.create(tmp_path / "proj", COCO17, owner="admin_tobias")
    p.store.add_user(ANN, "annotator")
    p.store.add_user(REV, "reviewer")
    img = np.full((240, 320, 3), 128, np.uint8)
    # person 0: face points labelled
    face0 = {"nose": (100, 60), "left_eye": (106, 52), "right_eye": (94, 52), "left_ear": (114, 56),
             "right_ear": (86, 56)}
    for x, y in face0.values():
        _checker(img, x, y, 5)
    # person 1: no face point labelled, a face-like patch above the shoulders
    _checker(img, 240, 85, 10)
    # a control patch far from everyone: must stay sharp
    _checker(img, 30, 210, 6)
    src = tmp_path / "media" / "Quillfeather_Marisol_07" / "two_people.png"
    src.parent.mkdir(parents=True)
    assert cv2.imwrite(str(src), img)
    ch, _ = ops.add_media(p, [src], participant="QB-07")
    fid = ch.frames[0]
    k0 = np.zeros((17, 3))
    for n, (x, y) in face0.items():
        k0[I[n]] = (x, y, 2)
    for n, xy in (("left_shoulder", (120, 90)), ("right_shoulder", (80, 90)), ("left_hip", (115, 160)),
                  ("right_hip", (85, 160))):
        k0[I[n]] = (*xy, 2)
    k1 = np.zeros((17, 3))
    for n, xy in (("left_shoulder", (260, 120)), ("right_shoulder", (220, 120)), ("left_hip", (255, 190)),
                  ("right_hip", (225, 190))):
        k1[I[n]] = (*xy, 2)
    for person, k in ((0, k0), (1, k1)):
        review.edit(p, fid, k, H, user=ANN, person=person)
        a = p.store.annotation(fid, person)
        review.submit(p, a.id, user=ANN)
        review.accept(p, a.id, user=REV)
    out = tmp_path / "bundle"
    export.export_bundle(p, out, deidentify=True, ratios=(1.0, 0.0, 0.0))
    (png,) = (out / "train").glob("*.png")
    got = cv2.imread(str(png))
    assert got.shape == img.shape
    for name, (x, y) in face0.items():
        before, after = _local_var(img, x, y), _local_var(got, x, y)
        assert before > 5000 and after < 0.1 * before, (name, before, after)
    assert _local_var(got, 240, 85) < 0.1 * _local_var(img, 240, 85)
    assert _local_var(got, 30, 210) == pytest.approx(_local_var(img, 30, 210))   # the blur is local
    man = json.loads((out / "manifest.json").read_text())["deidentification"]
    assert man["faces_blurred_from_face_points"] == 1 and man["heads_blurred_from_person_box"] == 1
    p.close()


def test_face_region_from_points_and_fallback():
    k = np.zeros((17, 3))
    assert export.face_region(k, COCO17.keypoints) is None
    k[I["left_ear"]] = (120, 50, 2)
    k[I["right_ear"]] = (80, 50, 2)
    reg = export.face_region(k, COCO17.keypoints, margin=0.5)
    # centre between the ears, radius = max(20, 0.5 x 40) + 0.5 x 40 (head size = ear-to-ear 40 px)
    assert reg.kind == "circle" and reg.values == pytest.approx((100, 50, 40))
    k2 = np.zeros((17, 3))
    k2[I["left_hip"]] = (60, 100, 2)
    k2[I["right_hip"]] = (40, 100, 2)
    reg = export.face_region(k2, COCO17.keypoints, bbox=(30, 20, 40, 100))
    assert reg.kind == "rect" and reg.basis == "box"
    x0, y0, x1, y1 = reg.values
    assert x0 < 30 and x1 > 70 and y0 < 20 < y1


def test_export_command_bundle_options(study, tmp_path, capsys):
    p, _ = study
    root = p.root
    out = tmp_path / "cli_bundle"
    assert main(["--user", REV, "export", str(root), str(out), "--split", "0.6", "0.2", "0.2", "--seed", "3",
                 "--deidentify"]) == 0
    text = capsys.readouterr().out
    assert "must check" in text and (out / "manifest.json").is_file()
    assert main(["export", str(root), str(tmp_path / "x"), "--bundle", "--format", "coco-results"]) == 2
    assert "neither --format coco-results" in capsys.readouterr().err
    assert main(["export", str(root), str(tmp_path / "x.json"), "--split", "0.5", "0.5", "0.5"]) == 2
    assert "add up to 1" in capsys.readouterr().err
    # the single-file export still works as before
    assert main(["export", str(root), str(tmp_path / "plain.json")]) == 0
    assert len(json.loads((tmp_path / "plain.json").read_text())["annotations"]) == 10
