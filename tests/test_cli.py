import json
import subprocess
import sys

import pytest

from conftest import write_video
from kinemark.core.cli import main


def run(*args):
    return main([str(a) for a in args])


def test_new_add_info_export(tmp_path, capsys):
    proj = tmp_path / "p"
    assert run("new", proj) == 0
    assert "research data, not a diagnosis" in capsys.readouterr().out
    v = write_video(tmp_path / "v.mp4", n_frames=30)
    assert run("add", proj, v, "--participant", "QB-02", "--count", "4") == 0
    out = capsys.readouterr().out
    assert "4 frames" in out
    assert run("info", proj) == 0
    out = capsys.readouterr().out
    assert "frames 4" in out and "QB-02" in out and "blank 4" in out
    assert run("export", proj, tmp_path / "o.json") == 0
    assert json.loads((tmp_path / "o.json").read_text())["annotations"] == []


def test_info_lists_media_ids_for_relink(tmp_path, capsys):
    """relink asks for a media id, which info did not print (found by the session-8 audit)."""
    from kinemark.core.project import Project
    proj = tmp_path / "p"
    run("new", proj)
    v = write_video(tmp_path / "v.mp4", n_frames=30)
    run("add", proj, v, "--participant", "QB-02", "--count", "4")
    with Project.open(proj) as p:
        mid = p.store.all_media()[0].id
        p.store.set_media_status(mid, "changed")
    capsys.readouterr()
    assert run("info", proj, "--media") == 0
    out = capsys.readouterr().out
    row = next(line for line in out.splitlines() if line.strip().startswith(str(mid)))
    assert row.split()[:6] == [str(mid), "QB-02", "1", "video", "4", "changed"] and "v.mp4" in row
    assert f"CHANGED ON DISK (relink needed): media {mid}," in out and f"relink {proj} {mid}" in out


@pytest.mark.parametrize("args,match", [
    (["info", "{tmp}/nothing"], "is not a folder"),
    (["new", "{tmp}/p", "--skeleton", "{tmp}/none.json"], "no built-in skeleton"),
    (["add", "{tmp}/p0", "{tmp}/x.mp4"], "not a Kinemark project"),
    (["export", "{tmp}/p0", "{tmp}/o.json", "--format", "xml"], "invalid choice"),
    (["frobnicate"], "invalid choice"),
    (["new", "{tmp}/afile/sub"], "cannot create the project folder"),
    (["bench", "fuzz", "--cases", "-3"], "--cases must be above 0"),
    (["bench", "export", "--frames", "-5"], "--frames must be above 0"),
    (["bench", "team", "--seconds", "nan"], "--seconds must be above 0"),
    (["bench", "queue", "--tuning", "--tuning-seeds", "0,x"], "--tuning-seeds must be whole numbers"),
    # the PostgreSQL driver's message ends with a line break (found by the session-8 audit)
    (["new", "{tmp}/t", "--db", "mysql://user@localhost/db"], "not a PostgreSQL connection string"),
    (["add", "{tmp}/p0", "{tmp}/x.mp4", "--every", "abc"], "argument --every: invalid int value"),
])
def test_user_errors_exit_2_with_one_line(tmp_path, capsys, args, match):
    (tmp_path / "p0").mkdir()
    (tmp_path / "afile").write_text("not a folder")
    rc = run(*[a.format(tmp=tmp_path) for a in args])
    err = capsys.readouterr().err
    assert rc == 2
    assert match in err
    assert "Traceback" not in err and len(err.splitlines()) == 1 and err.endswith("\n")
    assert err.startswith("kinemark: error: ") and not err.startswith("kinemark: error: kinemark")


def test_no_traceback_from_the_installed_command(tmp_path):
    (tmp_path / "bad.mp4").write_bytes(b"")
    subprocess.run([sys.executable, "-m", "kinemark.core.cli", "new", str(tmp_path / "p")], check=True,
                   capture_output=True)
    r = subprocess.run([sys.executable, "-m", "kinemark.core.cli", "add", str(tmp_path / "p"),
                        str(tmp_path / "bad.mp4")], capture_output=True, text=True)
    assert r.returncode == 2
    assert "empty" in r.stderr and "Traceback" not in r.stderr
    r = subprocess.run([sys.executable, "-m", "kinemark.core.cli", "--debug", "add", str(tmp_path / "p"),
                        str(tmp_path / "bad.mp4")], capture_output=True, text=True)
    assert r.returncode != 0 and "Traceback" in r.stderr


def test_info_sets_the_project_target(tmp_path, capsys):
    proj = tmp_path / "p"
    assert run("new", proj) == 0
    assert run("info", proj, "--set-target", "150") == 0
    assert "0 of 150 frames accepted" in capsys.readouterr().out
    from kinemark.core.project import Project
    with Project.open(proj) as p:
        assert p.store.get_meta("target_frames") == "150"
    assert run("info", proj, "--set-target", "0") == 2
