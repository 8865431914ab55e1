"""The ``kinemark`` command: argument parsing only; the work is in ``ops``.

User errors print one line and exit 2. Nothing prints a traceback unless
``--debug`` is given.
"""
from __future__ import annotations

import argparse
import sys
from pathlib import Path

from .errors import KinemarkError

CAUTION = ("Kinemark labels and model output are research data, not a diagnosis. The study's protocol, "
           "its ethics approval and local privacy law come first.")


class _Parser(argparse.ArgumentParser):
    def error(self, message):
        # main() adds the "kinemark: error:" prefix; the hint names the subcommand's help
        raise KinemarkError(f"{message} (see '{self.prog} --help')")


class ProgressBar:
    """A one-line text progress bar on stderr (silent when stderr is not a terminal, unless forced)."""

    def __init__(self, stream=None, force: bool = False):
        self.stream = stream or sys.stderr
        self.enabled = force or self.stream.isatty()
        self._last = None

    def __call__(self, done: int, total: int, message: str = ""):
        if not self.enabled:
            return
        total = max(total, 1)
        frac = min(done / total, 1.0)
        line = f"\r[{'#' * int(frac * 30):<30}] {done}/{total} {message[:40]:<40}"
        if line != self._last:
            self.stream.write(line)
            self.stream.flush()
            self._last = line
        if done >= total:
            self.stream.write("\n")
            self._last = None


def _open(path):
    from .project import Project
    return Project.open(path)


def cmd_new(a):
    from . import ops
    from .skeleton import load_skeleton
    skel = load_skeleton(a.skeleton)
    with ops.new_project(a.dir, skel, owner=a.user, media_root=a.media_root, db=a.db,
                         schema=a.db_schema) as p:
        print(f"created project {p.root} with skeleton {skel.name} ({skel.num_keypoints} keypoints); "
              f"owner {p.user().name}")
    print(CAUTION)


def cmd_add(a):
    from . import ops
    from .media import Sampling, display_name, media_kind
    sampling = Sampling(every=a.every, seconds=a.seconds, count=a.count)
    if a.every is None and a.seconds is None and a.count is None:
        sampling = Sampling(every=1)
    with _open(a.dir) as p:
        changes, rep = ops.add_media(p, [Path(f) for f in a.files], participant=a.participant,
                                     session=a.session, sampling=sampling, user=a.user,
                                     progress=ProgressBar(), strict=not a.keep_going)
        for path, mid, n in rep.added:
            if media_kind(path) == "image":      # the sampling rule is for videos and image folders
                print(f"added {path} as media {mid}: 1 image")
            else:
                print(f"added {path} as media {mid}: {n} frames ({sampling.describe()})")
        for path, other in rep.duplicates:
            print(f"skipped {path}: already in the project as {other} (same checksum)")
        not_media = [path for path, why in rep.skipped if why == ops.NOT_MEDIA]
        if not_media:
            print(f"skipped {len(not_media)} file(s) that are neither images nor videos")
        for path, why in rep.skipped:
            if why != ops.NOT_MEDIA:
                print(f"skipped {display_name(path)}: {why}")
        for path, msg in rep.failed:
            print(f"failed: {msg}")
        print(changes.message)
        if rep.failed:
            return 2


def cmd_info(a):
    from . import ops
    with _open(a.dir) as p:
        if a.set_target is not None:
            print(ops.set_target(p, a.set_target, user=a.user).message)
        d = ops.info(p)
        d["target"] = p.store.get_meta(ops.TARGET_KEY)
    print(f"project   {d['root']}")
    print(f"skeleton  {d['skeleton']} ({d['keypoints']} keypoints), schema v{d['schema_version']}")
    print(f"media     {d['media']}   frames {d['frames']}")
    print("states    " + "  ".join(f"{k} {v}" for k, v in d["states"].items()))
    if d.get("target"):
        print(f"target    {d['states'].get('accepted', 0)} of {d['target']} frames accepted")
    print("by participant (media, frames, accepted):")
    for code, m, f, acc in d["participants"]:
        print(f"  {code:<12} {m:>5} {f:>7} {acc:>7}")
    if a.media:
        print("media (id, participant, session, kind, frames kept, status, path):")
        for mid, code, sess, kind, n, status, path in d["media_list"]:
            print(f"  {mid:>5}  {code or '-':<12} {sess if sess is not None else '-':>4}  {kind:<5} {n:>7}  "
                  f"{status:<7}  {path}")
    for mid, _, _, _, _, status, path in d["media_list"]:
        if status == "changed":
            print(f"CHANGED ON DISK (relink needed): media {mid}, {path} "
                  f"(kinemark relink {a.dir} {mid} [NEW_PATH])")


def cmd_export(a):
    from . import ops
    bundle = a.bundle or a.split is not None or a.seed is not None or a.deidentify
    if bundle:
        if a.format != "coco" or a.images_to:
            raise KinemarkError("a bundle (--bundle, --split, --seed, --deidentify) is COCO with its images "
                                "inside; it takes neither --format coco-results nor --images-to")
        from .export import DEFAULT_RATIOS, export_bundle
        with _open(a.dir) as p:
            ch = export_bundle(p, a.out, states=a.states, ratios=a.split or DEFAULT_RATIOS,
                               seed=a.seed or 0, deidentify=a.deidentify, user=a.user, progress=ProgressBar())
        print(ch.message)
        print(CAUTION)
        return
    with _open(a.dir) as p:
        ch = ops.export_coco(p, a.out, states=a.states, fmt=a.format, images_to=a.images_to,
                             progress=ProgressBar(), overwrite=a.overwrite)
    print(ch.message)


def cmd_check(a):
    from . import qa
    with _open(a.dir) as p:
        required = None
        if a.require is not None:
            required = [p.skeleton.index(n.strip()) for n in a.require.split(",") if n.strip()]
        flags = qa.run_checks(p, states=a.states, required=required)
        frames = {f.id: f for f in p.store.frames()}
        media = {m.id: m for m in p.store.all_media()}
        for fl in flags:
            f = frames[fl.frame_id]
            m = media[f.media_id]
            who = m.participant_code or "-"
            print(f"frame {fl.frame_id} ({who} {m.display_name} #{f.frame_index}) person {fl.person} "
                  f"{fl.severity} {fl.check}: {fl.message}")
        n_err = sum(fl.severity == qa.ERROR for fl in flags)
        n_ann = len({fl.annotation_id for fl in flags})
        print(f"{len(flags)} flag(s) on {n_ann} annotation(s): {n_err} error(s), {len(flags) - n_err} warning(s)")
    return 1 if (a.strict and n_err) else 0


def cmd_agreement(a):
    from . import agreement
    with _open(a.dir) as p:
        if a.pick:
            print(agreement.choose_frames(p, share=a.share, seed=a.seed, user=a.user).message)
            return
        if a.html or a.csv:     # checked before any work: a refused path stops the command here
            from .report import report_paths
            paths = report_paths(a.html, a.csv, project=p, overwrite=a.overwrite)
        rep = agreement.build_report(p)
    print(agreement.format_text(rep))
    if a.html or a.csv:
        from .report import write_report
        h, c = write_report(rep, *paths, overwrite=a.overwrite)
        for path in (h, c):
            if path is not None:
                print(f"wrote {path}")


def cmd_import(a):
    from . import ops
    with _open(a.dir) as p:
        ch, plan = ops.import_coco(p, a.file, a.images, policy=a.on_problem, state=a.as_state,
                                   participant=a.participant, user=a.user, progress=ProgressBar())
    for prob in plan.problems:
        print(f"skipped {prob}")
    for note in plan.notices:
        print(f"ignored {note}")
    print(ch.message)


def cmd_relink(a):
    from . import ops
    with _open(a.dir) as p:
        print(ops.relink(p, a.media, a.path, accept_changed_pixels=a.accept_changed_pixels,
                         user=a.user).message)


def cmd_propose(a):
    from . import ops
    with _open(a.dir) as p:
        ch, rep = ops.propose(p, frames=a.frames, workers=a.workers, progress=ProgressBar())
    print(ch.message)
    for fid, msg in rep.failed[:10]:
        print(f"  frame {fid}: {msg}")
    if rep.failed and rep.proposed == 0:
        return 2


def cmd_rank(a):
    from . import ops
    from .ranking import RankWeights
    with _open(a.dir) as p:
        if a.set_weights:
            base = RankWeights.from_json(p.store.get_meta("ranking_weights"))
            w = RankWeights.parse_user(a.set_weights, base)
            p.store.set_meta("ranking_weights", w.to_json(), user_id=p.user(a.user).id)
            print(f"ranking weights for this project: {w.to_json()}")
            for note in w.caveats():
                print(f"note: {note}")
        entries = ops.rank(p, a.batch)
        names = {m.id: m.display_name for m in p.store.all_media()}
        hint = ops.tuning_suggestion(p)
    if not entries:
        print("the queue is empty: every frame is labelled")
    for n, e in enumerate(entries, 1):
        print(f"{n:>4}. frame {e.frame_id:<6} {names.get(e.media_id, e.media_id)} #{e.frame_index:<6} "
              f"score {e.score:.2f}  {'; '.join(e.reasons)}")
    if hint:
        print(f"note: {hint} (kinemark adapt {a.dir} --tune)")


def cmd_adapt(a):
    from . import ops
    if a.tune and a.untune:
        raise KinemarkError("--tune and --untune contradict each other: give one")
    with _open(a.dir) as p:
        if a.untune:
            ch, _ = ops.untune(p, user=a.user)
            print(ch.message)
            return
        ch, corr = ops.adapt(p, user=a.user)
        print(ch.message)
        if a.tune:
            ch, _ = ops.tune(p, user=a.user, progress=ProgressBar())
            print(ch.message)


def cmd_demo(a):
    from .demo import run_demo
    out = Path(a.out)
    clips = Path(a.clips) if a.clips else out / "clips"
    if not a.clips and not (clips / "scenario.json").exists() and a.size == "demo":
        shipped = Path("sample_project") / "clips"
        if (shipped / "scenario.json").exists():
            clips = shipped
    print(CAUTION)
    summary = run_demo(out, clips_dir=clips, size=a.size, seed=a.seed, label=a.label, every=a.every,
                       progress_factory=lambda: ProgressBar())
    print(summary.text())


def cmd_open(a):
    # the desktop workspace lives in kinemark.app; imported only here, so core never loads Qt.
    # A folder with the demo clips but no project (sample_project on a fresh clone) is built
    # first, with progress here on the terminal (see app.main.run).
    from ..app.main import run
    return run(a.dir, screenshot=a.screenshot, user=a.user)


def cmd_claim(a):
    from . import ops
    with _open(a.dir) as p:
        if a.release:
            n = p.store.release_claims(p.user(a.user).id)
            print(f"released {n} frame(s)")
            return
        ch, new, renewed = ops.claim_batch(p, a.batch, lease_minutes=a.minutes, user=a.user)
        frames = {f.id: f for f in p.store.frames()}
        names = {m.id: m.display_name for m in p.store.all_media()}
    print(ch.message)
    for fid in renewed + new:
        f = frames[fid]
        print(f"  frame {fid:<6} {names[f.media_id]} #{f.frame_index}")


def cmd_bench(a):
    from . import bench
    bench.run(a.what, a)


def build_parser() -> argparse.ArgumentParser:
    from .model import ACCEPTED, IN_REVIEW, STATES
    ap = _Parser(prog="kinemark", description="Keypoint labelling for clinical movement research. " + CAUTION)
    ap.add_argument("--debug", action="store_true", help="show tracebacks")
    ap.add_argument("--user", help="who is working (default: the project's default user, or $KINEMARK_USER)")
    sub = ap.add_subparsers(dest="cmd", required=True, parser_class=_Parser)

    s = sub.add_parser("new", help="create a project folder")
    s.add_argument("dir")
    s.add_argument("--skeleton", default="coco17", help="coco17 (built in) or a skeleton JSON file")
    s.add_argument("--media-root", help="a shared folder that media paths are stored relative to")
    s.add_argument("--db", help="team mode: a PostgreSQL connection string without a password "
                                "(postgresql://user@host/db); the password comes from PGPASSWORD or ~/.pgpass")
    s.add_argument("--db-schema", help="team mode: the schema that holds this project (default: from the folder name)")
    s.set_defaults(fn=cmd_new)

    s = sub.add_parser("add", help="add videos, image folders or images")
    s.add_argument("dir")
    s.add_argument("files", nargs="+")
    s.add_argument("--participant", help="pseudonymous participant code, e.g. QB-01")
    s.add_argument("--session", type=int, help="session number (default 1)")
    g = s.add_mutually_exclusive_group()
    g.add_argument("--every", type=int, help="keep every Nth frame")
    g.add_argument("--seconds", type=float, help="keep a frame every T seconds")
    g.add_argument("--count", type=int, help="keep K evenly spaced frames")
    s.add_argument("--keep-going", action="store_true", help="report unreadable files and go on with the rest")
    s.set_defaults(fn=cmd_add)

    s = sub.add_parser("info", help="counts by state and by participant")
    s.add_argument("dir")
    s.add_argument("--set-target", type=int, metavar="N",
                   help="how many accepted frames the study aims for (shown as progress in the workspace)")
    s.add_argument("--media", action="store_true",
                   help="also list every media file with its id (the id 'kinemark relink' asks for)")
    s.set_defaults(fn=cmd_info)

    s = sub.add_parser("export", help="write COCO keypoints (accepted labels by default)")
    s.add_argument("dir")
    s.add_argument("out")
    s.add_argument("--states", nargs="+", default=[ACCEPTED], choices=STATES)
    s.add_argument("--format", default="coco", choices=["coco", "coco-results"])
    s.add_argument("--images-to", help="also write the frames as PNG files into this folder")
    s.add_argument("--bundle", action="store_true",
                   help="write a bundle folder OUT: COCO per split, frames, tables, manifest")
    s.add_argument("--split", nargs=3, type=float, metavar=("TRAIN", "VAL", "TEST"),
                   help="bundle: participant-level split ratios (default 0.7 0.15 0.15)")
    s.add_argument("--seed", type=int, help="bundle: seed of the participant split (default 0)")
    s.add_argument("--deidentify", action="store_true",
                   help="bundle: blur faces, pseudonymous names, no original names, paths or dates")
    s.add_argument("--overwrite", action="store_true",
                   help="replace an existing OUT file and frame files in --images-to (default: refuse); "
                        "a bundle always needs a new or empty folder")
    s.set_defaults(fn=cmd_export)

    s = sub.add_parser("check", help="run the QA checks and print their flags")
    s.add_argument("dir")
    s.add_argument("--states", nargs="+", choices=STATES,
                   help="states to check (default: everything a person has touched)")
    s.add_argument("--require", help="comma-separated keypoints that must be labelled "
                                     "(default: the project's setting, else shoulders and hips)")
    s.add_argument("--strict", action="store_true", help="exit 1 when there is any error flag")
    s.set_defaults(fn=cmd_check)

    s = sub.add_parser("agreement", help="agreement figures: annotators, reviewer, model")
    s.add_argument("dir")
    s.add_argument("--html", help="write the report page here (a CSV of the numbers goes beside it)")
    s.add_argument("--csv", help="write the numbers here (default: beside the HTML page)")
    s.add_argument("--pick", action="store_true", help="choose the frames for double labelling, then stop")
    s.add_argument("--share", type=float, default=0.10, help="with --pick: share of frames (default 0.10)")
    s.add_argument("--seed", type=int, default=0, help="with --pick: seed of the choice (default 0)")
    s.add_argument("--overwrite", action="store_true",
                   help="replace an existing report page or CSV (default: refuse)")
    s.set_defaults(fn=cmd_agreement)

    s = sub.add_parser("import-coco", help="import a COCO keypoints file")
    s.add_argument("dir")
    s.add_argument("file")
    s.add_argument("--images", required=True, help="folder the file_name entries are relative to")
    s.add_argument("--on-problem", default="refuse", choices=["refuse", "skip"],
                   help="refuse the whole file (default) or skip bad records")
    s.add_argument("--as-state", default=IN_REVIEW, choices=STATES,
                   help=f"state of imported labels (default {IN_REVIEW}: a reviewer checks them)")
    s.add_argument("--participant", help="participant code for the imported images")
    s.set_defaults(fn=cmd_import)

    s = sub.add_parser("relink", help="accept a changed or moved media file after checking its frames")
    s.add_argument("dir")
    s.add_argument("media", type=int, help="media id (see 'kinemark info DIR --media')")
    s.add_argument("path", nargs="?", help="new location of the file")
    s.add_argument("--accept-changed-pixels", action="store_true",
                   help="accept a file whose frames decode to different pixels, such as a re-encoded copy "
                        "of the same recording (compare a few frames first)")
    s.set_defaults(fn=cmd_relink)

    s = sub.add_parser("propose", help="pre-fill frames with the pose model (resumable)")
    s.add_argument("dir")
    s.add_argument("--frames", default="unlabelled", choices=["unlabelled", "all"])
    s.add_argument("--workers", type=int, default=1, help="parallel model workers (each with its own session)")
    s.set_defaults(fn=cmd_propose)

    s = sub.add_parser("rank", help="the frames most worth labelling next, with reasons")
    s.add_argument("dir")
    s.add_argument("--batch", type=int, default=50)
    s.add_argument("--set-weights", metavar="JSON",
                   help='change this project\'s ranking weights, e.g. \'{"uncertainty": 2, "novelty": 1}\'')
    s.set_defaults(fn=cmd_rank)

    s = sub.add_parser("adapt", help="refit the per-project correction of proposals from accepted labels")
    s.add_argument("dir")
    s.add_argument("--tune", action="store_true",
                   help="also tune the model's heatmap layers on the labels (needs PyTorch; about a "
                        "minute per hundred labels, then pre-fills untouched frames again)")
    s.add_argument("--untune", action="store_true",
                   help="stop using the project's tuned model (untouched frames go back to the raw model)")
    s.set_defaults(fn=cmd_adapt)

    s = sub.add_parser("claim", help="team mode: take a batch of frames from the queue as a lease")
    s.add_argument("dir")
    s.add_argument("--batch", type=int, default=20)
    s.add_argument("--minutes", type=float, default=60.0, help="how long the lease lasts, in minutes (1 to 2160; default 60)")
    s.add_argument("--release", action="store_true", help="give back every frame you hold")
    s.set_defaults(fn=cmd_claim)

    s = sub.add_parser("demo", help="the main job, headless, on the invented Quillon Bay clinic scenario")
    s.add_argument("--out", default="sample_project", help="project folder (default: sample_project)")
    s.add_argument("--clips", help="folder of scenario clips (default: OUT/clips; rendered if missing)")
    s.add_argument("--size", default="demo", choices=["demo", "tiny"], help="tiny: a quick run for tests")
    s.add_argument("--seed", type=int, default=7)
    s.add_argument("--label", type=int, default=60, help="how many top-ranked frames the simulated annotator labels")
    s.add_argument("--every", type=int, default=3, help="sample every Nth video frame")
    s.set_defaults(fn=cmd_demo)

    s = sub.add_parser("open", help="open the project in the desktop workspace")
    s.add_argument("dir")
    s.add_argument("--screenshot", metavar="FILE.png",
                   help="render the window offscreen, save it to FILE.png and exit")
    s.set_defaults(fn=cmd_open)

    s = sub.add_parser("bench", help="measure speed and memory; prints figures")
    s.add_argument("what", choices=["export", "open", "rank", "propose", "queue", "team", "gui", "crash", "fuzz",
                                    "all"])
    s.add_argument("--frames", type=int, default=None, help="override the benchmark size")
    s.add_argument("--seconds", type=float, default=None, help="team: how long the load runs (default 60)")
    s.add_argument("--db", help="team: PostgreSQL connection string (default $KINEMARK_TEST_PG)")
    s.add_argument("--project", help="queue: the sample project's folder (default sample_project)")
    s.add_argument("--scenario-seed", type=int, default=None,
                   help="queue: draw the invented scenario with this seed into --project (a new folder) "
                        "and measure on it; the sample project is seed 7")
    s.add_argument("--tuning", action="store_true",
                   help="queue: also measure network tuning (adapt --tune; needs PyTorch) at N=100")
    s.add_argument("--tuning-seeds", default=None, metavar="LIST",
                   help="queue --tuning: selection seeds, e.g. 0,1 (default 0; each seed adds a tuning of "
                        "about 35 s per strategy and held-out split, one per round for those in rounds)")
    s.add_argument("--tuning-strategies", default=None, metavar="LIST",
                   help="queue --tuning: which strategies to tune on, e.g. combined,4-round (default all; "
                        "random and uniform always, the ratios need them; the oracle-* ones read the exact truth, "
                        "a diagnostic)")
    s.add_argument("--cases", type=int, default=None, help="crash: kills (default 50); fuzz: COCO files (10000)")
    s.set_defaults(fn=cmd_bench)
    return ap


def _one_line(e: Exception) -> str:
    """The message on one line: messages from libraries (the PostgreSQL driver's, say) may
    hold line breaks or end with one."""
    return "; ".join(line.strip() for line in str(e).splitlines() if line.strip())


def main(argv=None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    debug = "--debug" in argv
    try:
        args = build_parser().parse_args(argv)
        rc = args.fn(args)
        return int(rc or 0)
    except KinemarkError as e:
        if debug:
            raise
        print(f"kinemark: error: {_one_line(e)}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("kinemark: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:        # output piped into e.g. `head`, which stopped reading
        import os
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0
    except Exception as e:  # a bug: say so in one line unless --debug
        if debug:
            raise
        print(f"kinemark: internal error ({type(e).__name__}: {_one_line(e)}); run again with --debug "
              f"for the traceback and report it", file=sys.stderr)
        return 1


if __name__ == "__main__":
    sys.exit(main())
