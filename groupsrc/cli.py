"""Command line: ``groupsrc demo | check | run | report | followup | cache | init``.

Exit codes: 0 success, 1 a problem with the data or design (every problem
listed), 2 a usage error.
"""

from __future__ import annotations

import argparse
import json
import logging
import signal
import sys
import time
from pathlib import Path

from . import __version__
from .inputs.problems import InputError, ProblemList
from .options import cap_workers, check_options, dash_values
from .stats.engine.scheduler import BackendUnavailable

EXIT_OK, EXIT_DATA, EXIT_USAGE = 0, 1, 2


def _parser():
    p = argparse.ArgumentParser(
        prog="groupsrc",
        description="Group statistics for source-space EEG/MEG event-related responses.")
    p.add_argument("--version", action="version", version=f"groupsrc {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")

    d = sub.add_parser("demo", help="build the demo cohort, run its analysis, write a report")
    d.add_argument("--out", type=Path, default=None,
                   help="results folder (default: ./groupsrc_demo_results, with --surface "
                        "./groupsrc_surface_demo_results)")
    d.add_argument("--cohort-dir", type=Path, default=None,
                   help="where to build the demo cohort (default: beside the results folder, "
                        "its name plus _cohort, e.g. ./groupsrc_demo_results_cohort)")
    d.add_argument("--small", action="store_true", help="a small, fast cohort (for tests)")
    d.add_argument("--surface", action="store_true",
                   help="the cortical-surface demo: GIfTI maps on a synthetic folded cortex")
    d.add_argument("--resamples", type=int, default=None,
                   help="override the demo's [inference] resamples (default: the demo "
                        "analysis file's value)")
    d.add_argument("--seed", type=int, default=None,
                   help="override the demo's [inference] seed of the rearrangements")
    d.add_argument("--workers", type=int, default=1,
                   help="parallel workers for the resampling (default 1), as for run")
    d.add_argument("--overwrite", action="store_true", help="replace an existing results folder")
    d.add_argument("--build-only", action="store_true", help="build and check the cohort only")
    d.add_argument("--quiet", action="store_true",
                   help="no progress bars or progress lines (problems are still printed)")

    c = sub.add_parser("check", help="validate cohort, design and settings; list every problem")
    c.add_argument("analysis", type=Path, help="analysis file (TOML)")
    c.add_argument("--json", action="store_true", help="print the summary as JSON")

    r = sub.add_parser("run", help="run an analysis and write a results folder")
    r.add_argument("analysis", type=Path, help="analysis file (TOML)")
    r.add_argument("--out", type=Path, default=None,
                   help="results folder (default: 'results' beside the analysis file)")
    r.add_argument("--resamples", type=int, default=None, help="override [inference] resamples")
    r.add_argument("--seed", type=int, default=None, help="override [inference] seed")
    r.add_argument("--workers", type=int, default=1, help="parallel workers (default 1)")
    r.add_argument("--overwrite", action="store_true", help="replace an existing results folder")
    r.add_argument("--resume", action="store_true",
                   help="continue an interrupted run of the same analysis from its checkpoint")
    r.add_argument("--scheduler", default=None, metavar="ADDRESS|local:N",
                   help="run the resampling on Dask: a running scheduler's address "
                        "(tcp://host:8786) or local:N for a local cluster of N workers")
    r.add_argument("--memory", default=None, metavar="SIZE",
                   help="bound the working set, e.g. 2G or 512M (the interpreter and its "
                        "libraries, about 350 MiB, come on top)")
    r.add_argument("--quiet", action="store_true",
                   help="no progress bars or progress lines (problems are still printed)")

    i = sub.add_parser("init", help="write maps.tsv, a participants.tsv skeleton and an "
                       "analysis file from BIDS-like map file names (sub-01_cond-rare_...)")
    i.add_argument("maps_folder", type=Path, metavar="MAPS_FOLDER",
                   help="the folder holding the map files (searched recursively)")
    i.add_argument("--out", type=Path, default=None,
                   help="where to write the three files (default: the folder holding "
                        "MAPS_FOLDER); an existing file is never overwritten")

    k = sub.add_parser("cache", help="show the loading cache (entries, size, limit); clear "
                       "it or set its size limit")
    k.add_argument("--folder", type=Path, default=None,
                   help="the cache folder (default: $GROUPSRC_CACHE_DIR, else "
                        "~/.cache/groupsrc; give an analysis file's [cohort] cache here)")
    k.add_argument("--clear", action="store_true",
                   help="remove every entry (always safe: the next check or run decodes the "
                        "maps again)")
    k.add_argument("--limit", default=None, metavar="SIZE",
                   help="keep the folder within SIZE (e.g. 8G), removing the entries used "
                        "least recently; stored in the folder")

    rp = sub.add_parser("report", help="rebuild figures and report from a results folder")
    rp.add_argument("results", type=Path, help="results folder written by 'groupsrc run'")

    f = sub.add_parser("followup", help="region means per map and a statsmodels mixed-model "
                       "refit, for significant clusters or a region of yours")
    f.add_argument("results", type=Path, help="results folder written by 'groupsrc run'")
    f.add_argument("--contrast", default=None, help="only this contrast's clusters")
    f.add_argument("--cluster", type=int, nargs="+", default=None, metavar="K",
                   help="these cluster numbers of --contrast (default: the significant ones)")
    f.add_argument("--mask", type=Path, action="append", default=None, metavar="FILE",
                   help="a region of yours, nonzero = in it: a 3D NIfTI mask on the template "
                        "grid; on a surface a GIfTI mask per hemisphere (give --mask once per "
                        "file) or a CIFTI-2 .dscalar.nii / .dlabel.nii")
    f.add_argument("--window", type=float, nargs=2, default=None, metavar=("START", "STOP"),
                   help="time window of the --mask region in seconds (default: all samples)")
    f.add_argument("--out", type=Path, default=None,
                   help="folder to write (default: RESULTS_followup beside the results)")
    f.add_argument("--overwrite", action="store_true", help="replace an earlier follow-up")
    return p


def main(argv=None) -> int:
    parser = _parser()
    raw = list(sys.argv[1:] if argv is None else argv)
    args = parser.parse_args(dash_values(raw, parser))
    if args.command is None:
        parser.print_help(sys.stderr)
        return EXIT_USAGE
    check_options(args, parser)
    _log_to_stderr()
    previous = _on_sigterm()
    try:
        return _dispatch(args, argv)
    except InputError as exc:
        print(exc.problems.format(), file=sys.stderr)
        return EXIT_DATA
    except BackendUnavailable as exc:
        print(f"1 problem found:\n  1. --scheduler: {exc} -> start the scheduler and its "
              "workers first, check the address and port (a scheduler's own port, usually "
              "8786), or use --scheduler local:N (or leave --scheduler out) to run on this "
              "machine", file=sys.stderr)
        return EXIT_DATA
    except OSError as exc:
        # the file system refused (permission, disk full, ...): not a bug of ours
        where = exc.filename or "groupsrc"
        print(f"1 problem found:\n  1. {where}: {exc.strerror or exc} -> check the folder's "
              "permissions and free space; nothing was overwritten", file=sys.stderr)
        return EXIT_DATA
    except KeyboardInterrupt:
        print("interrupted; nothing was overwritten", file=sys.stderr)
        return 130
    except Terminated:
        print("terminated; nothing was overwritten", file=sys.stderr)
        return 128 + signal.SIGTERM
    finally:
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)


class Terminated(BaseException):
    """SIGTERM received: unwinds like Ctrl-C, so partial results are removed."""


def _on_sigterm():
    """Turn SIGTERM into an exception (main thread only); return the old handler."""
    import threading
    if threading.current_thread() is not threading.main_thread():
        return None

    def handler(signum, frame):
        raise Terminated()
    return signal.signal(signal.SIGTERM, handler)


class _StderrHandler(logging.Handler):
    """Writes to whatever sys.stderr is at the time (it may be redirected)."""

    def emit(self, record):
        try:
            print(self.format(record), file=sys.stderr)
        except Exception:  # pragma: no cover - logging must never fail a run
            self.handleError(record)


def _log_to_stderr():
    """Progress notes (e.g. cleanup of an interrupted run) go to stderr."""
    logger = logging.getLogger("groupsrc")
    if not any(isinstance(h, _StderrHandler) for h in logger.handlers):
        handler = _StderrHandler()
        handler.setFormatter(logging.Formatter("groupsrc: %(message)s"))
        logger.addHandler(handler)
        logger.setLevel(logging.INFO)
        logger.propagate = False


def _dispatch(args, argv) -> int:
    command = ["groupsrc"] + (list(argv) if argv is not None else sys.argv[1:])
    cap_workers(args)
    if args.command == "check":
        return cmd_check(args.analysis, as_json=args.json)
    if args.command == "run":
        from .pipeline import run
        t = time.perf_counter()
        out = run(args.analysis, args.out, resamples=args.resamples, seed=args.seed,
                  workers=args.workers, overwrite=args.overwrite, command=command,
                  resume=args.resume, scheduler=args.scheduler, memory=args.memory,
                  quiet=args.quiet)
        print(f"results written to {out} ({time.perf_counter() - t:.1f} s); "
              f"open {out / 'report.html'}")
        return EXIT_OK
    if args.command == "report":
        from .outputs import build_report
        from .outputs.runlock import results_lock
        with results_lock(args.results, command=command, option="RESULTS_DIR",
                          log=logging.getLogger("groupsrc").info):
            path = build_report(args.results)
        print(f"report rebuilt: {path}")
        return EXIT_OK
    if args.command == "demo":
        return cmd_demo(args, command)
    if args.command == "cache":
        return cmd_cache(args)
    if args.command == "init":
        return cmd_init(args)
    if args.command == "followup":
        from .followup import followup
        notes = []
        out = followup(args.results, contrast=args.contrast, clusters=args.cluster,
                       mask=args.mask, window=args.window, out=args.out,
                       overwrite=args.overwrite, notes=notes)
        for note in notes:
            print(f"note: {note}")
        print(f"follow-up written to {out}; read {out / 'followup.md'}")
        return EXIT_OK
    return EXIT_USAGE


def cmd_check(analysis: Path, as_json=False) -> int:
    from .pipeline import prepare
    from .inputs.settings import read_settings
    settings, problems = read_settings(analysis)
    prep = prepare(settings, prior=problems)
    s = prep.summary
    if as_json:
        print(json.dumps(s, indent=2))
        return EXIT_OK
    print(f"{settings.path}: no problems found")
    print(f"  participants : {s['participants']}"
          + (" (" + ", ".join(f"{k} {v}" for k, v in s.get('per_group', {}).items()) + ")"
             if s.get("per_group") else ""))
    if s.get("conditions"):
        print(f"  conditions   : {', '.join(s['conditions'])}")
    if s.get("sessions"):
        print(f"  sessions     : {', '.join(s['sessions'])}")
    print(f"  maps         : {s['maps']}")
    if "voxel_size_mm" in s:
        print(f"  sources      : {s['sources']} (voxel {' x '.join(f'{v:g}' for v in s['voxel_size_mm'])} mm)")
    else:
        vox = s.get("volume_parts", {})
        print(f"  sources      : {s['sources']} {'(vertices: ' if vox else 'vertices ('}"
              + ", ".join(f"{h} {p['sources']} of {p['vertices']}"
                          for h, p in s["hemispheres"].items())
              + (f"; {sum(vox.values())} voxels in {len(vox)} volume part"
                 f"{'s' if len(vox) > 1 else ''}" if vox else "")
              + f"; maps as {'CIFTI-2' if s['map_format'] == 'cifti' else 'GIfTI'})")
        for name, n in vox.items():
            print(f"  volume part  : {name} ({n} voxels)")
        for name, n in s.get("ignored_parts", {}).items():
            print(f"  not read     : {name} ({n} elements; a surface other than the two "
                  "cortices)")
        for h, n in s.get("mask_vertices_without_data", {}).items():
            print(f"  note         : {n} vertices of mask_{h} have no data in the maps and are "
                  "not sources")
    print(f"  samples      : {s['samples']}, {s['time_range_ms'][0]:g} to "
          f"{s['time_range_ms'][1]:g} ms every {s['sampling_interval_ms']:g} ms")
    from .pipeline import window_text
    tw = settings.inference.get("time_window")
    print(f"  window       : {window_text(s)} analysed"
          + (f" (time_window [{tw[0]:g}, {tw[1]:g}] s)" if tw else " (all samples)"))
    print(f"  loading cache: {'reused' if prep.cohort.cache_hit else 'built'}")
    from .pipeline import run_notes
    for note in run_notes(settings, prep):
        print(f"  note         : {note}")
    left_out = len(prep.summary.get("glm_excluded") or ())
    used = (f" ({prep.design.X.shape[0] - left_out} in the GLM contrasts, see below)"
            if left_out and any(p.model != "mixed" for p in prep.plans) else "")
    print(f"  design       : {prep.design.X.shape[0]} participants{used} x "
          f"{prep.design.X.shape[1]} coefficients: {', '.join(prep.design.X.columns)}")
    if prep.mixed is not None:
        _print_mixed(prep)
    for plan in prep.plans:
        model = ", mixed model" if plan.model == "mixed" else ""
        print(f"  contrast     : {plan.name} [{plan.statistic_name}, {plan.scheme}{model}] "
              f"{plan.description}")
        if plan.groups is not None:
            sizes = ", ".join(f"{k} {v}" for k, v in plan.groups.sizes.items())
            print(f"                 variance groups: {plan.groups.column} ({sizes}); "
                  f"{plan.groups.reason}")
    return EXIT_OK


def cmd_init(args) -> int:
    """``groupsrc init MAPS_FOLDER``: the three files of a new analysis (scaffold.py)."""
    from .scaffold import build
    print("\n".join(build(args.maps_folder, args.out).lines()))
    return EXIT_OK


def cmd_cache(args) -> int:
    """``groupsrc cache``: what the loading cache holds; ``--clear``, ``--limit``."""
    from .inputs.cache import default_cache_dir
    from .inputs.cache_upkeep import upkeep
    print("\n".join(upkeep((args.folder or default_cache_dir()).expanduser(),
                           clear=args.clear, new_limit=args.limit)))
    return EXIT_OK


def _print_mixed(prep):
    """What check says about the mixed model: its columns, the maps per participant,
    the empty cells, and the participants GLM contrasts leave out."""
    s, md = prep.summary, prep.mixed
    method = prep.settings.model.get("estimation", "reml").upper()
    print(f"  mixed model  : {method}, {len(md.X)} maps x {md.X.shape[1]} coefficients: "
          f"{', '.join(md.X.columns)}")
    print(f"  random       : {', '.join(md.z_names)} per participant")
    per = s.get("maps_per_participant", {})
    dist = {}
    for pid, k in per.items():
        dist.setdefault(k, []).append(pid)
    parts = []
    for k in sorted(dist):
        who = dist[k]
        names = f" ({', '.join(who)})" if len(who) <= 3 else ""
        parts.append(f"{len(who)} with {k} map{'s' if k != 1 else ''}{names}")
    print(f"  maps/person  : {'; '.join(parts)}")
    empty = s.get("empty_cells", [])
    print("  empty cells  : " + (", ".join(f"{p} {c}" for p, c in empty) if empty else "none"))
    if s.get("glm_excluded"):
        print(f"  GLM contrasts: leave out {', '.join(s['glm_excluded'])} (no map of every "
              "condition; the mixed model uses their maps)")
    for note in s.get("mixed_notes", []):
        print(f"  note         : {note}")


def cmd_demo(args, command) -> int:
    from .outputs.runlock import results_lock
    surface = getattr(args, "surface", False)
    out = (args.out or Path("groupsrc_surface_demo_results" if surface
                            else "groupsrc_demo_results")).resolve()
    # one demo per results folder at a time: the lock covers the cohort built beside it
    with results_lock(out, command=command, log=logging.getLogger("groupsrc").info):
        return _demo(args, command, out, surface)


def _demo(args, command, out, surface) -> int:
    from .outputs.folder import check_target, sweep_stale
    from .simulate import build_demo_cohort, check_cohort_target
    cohort_dir = (args.cohort_dir or out.parent / (out.name + "_cohort")).resolve()
    size = "small" if args.small else "default"
    # refuse before spending a minute on the simulation
    problems = ProblemList()
    check_cohort_target(cohort_dir, problems, option="--cohort-dir")
    sweep_stale(out)
    try:
        check_target(out, overwrite=args.overwrite, inputs=[cohort_dir], problems=problems)
    except InputError:
        pass
    if problems:
        raise InputError(problems)
    print(f"building the {size} {'surface ' if surface else ''}demo cohort in {cohort_dir} ...")
    t = time.perf_counter()
    if surface:
        from .simulate.surface_build import build_surface_demo_cohort
        analysis = build_surface_demo_cohort(cohort_dir, size=size)
    else:
        analysis = build_demo_cohort(cohort_dir, size=size)
    print(f"  built in {time.perf_counter() - t:.1f} s")
    rc = cmd_check(analysis)
    if rc != EXIT_OK or args.build_only:
        return rc
    from .pipeline import run
    t = time.perf_counter()
    res = run(analysis, out, resamples=args.resamples, seed=args.seed, workers=args.workers,
              overwrite=args.overwrite, command=command, quiet=args.quiet)
    print(f"results written to {res} ({time.perf_counter() - t:.1f} s); "
          f"open {res / 'report.html'}")
    return EXIT_OK


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
