"""Command line: ``msdkit run | simulate | demo | check | report``.

Exit codes of ``msdkit run``: 0 every input ok; 1 some inputs failed (the others are complete and written);
2 the config or the command line is invalid (nothing run).
"""

from __future__ import annotations

import argparse
import logging
import math
import sys
from pathlib import Path

from ._version import __version__

EXIT_OK, EXIT_SOME_FAILED, EXIT_INVALID = 0, 1, 2


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="msdkit",
        description="Diffusion coefficients, hydrodynamic sizes and motion verdicts from tracking movies.",
    )
    p.add_argument("--version", action="version", version=f"msdkit {__version__}")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    run = sub.add_parser("run", help="analyse every input listed in a YAML config")
    run.add_argument("config", help="YAML config file")
    run.add_argument("--output", "-o", help="output folder (overrides output_dir in the config)")
    run.add_argument("--force", action="store_true", help="recompute inputs whose results are already complete")
    run.add_argument("--executor", choices=["serial", "local", "dask"], help="override executor.kind")
    run.add_argument("--workers", type=int, help="override executor.n_workers")
    run.add_argument("--quiet", "-q", action="store_true", help="no progress bars, only the final table")

    sim = sub.add_parser("simulate", help="render synthetic movies with ground truth from scene recipes")
    sim.add_argument("recipes", nargs="+", help="scene recipe YAML files (see synthetic_movies/)")
    sim.add_argument("--output", "-o", default=None, help="folder for the movies (default: beside each recipe)")
    sim.add_argument("--seed", type=int, default=None, help="override the recipe's random seed")

    demo = sub.add_parser("demo", help="make the demo movies if missing and analyse them with configs/demo.yaml")
    demo.add_argument("--root", default=".", help="project folder holding configs/ and synthetic_movies/")
    demo.add_argument("--output", "-o", default=None, help="output folder (default: from configs/demo.yaml)")
    demo.add_argument("--executor", choices=["serial", "local", "dask"], help="override executor.kind")

    chk = sub.add_parser("check", help="validate a config and list the inputs it would run, without running")
    chk.add_argument("config")

    rep = sub.add_parser("report", help="rebuild report.html of an output folder from its results")
    rep.add_argument("output_dir")
    return p


def _print_table(rows) -> None:
    def fmt(v, spec):
        try:
            return "-" if v is None or (isinstance(v, float) and math.isnan(v)) else format(v, spec)
        except (TypeError, ValueError):
            return str(v)

    print(f"{'input':<28} {'status':<7} {'tracks':>6} {'D µm²/s':>9} {'alpha':>6} {'radius nm':>10}  flags / error")
    for r in rows:
        note = r.error if r.status != "ok" else ";".join(r.flags)
        print(
            f"{r.stack[:28]:<28} {r.status:<7} {r.n_tracks:>6} {fmt(r.D_um2_s, '9.4f')} "
            f"{fmt(r.alpha, '6.3f')} {fmt(r.radius_nm, '10.1f')}  {note}"
        )


def _load(path: str, *, executor: str | None = None, workers: int | None = None):
    from .config import load_config

    cfg = load_config(path)
    updates = {}
    if executor:
        updates["kind"] = executor
    if workers:
        updates["n_workers"] = workers
    if updates:
        cfg = cfg.model_copy(update={"executor": cfg.executor.model_copy(update=updates)})
    return cfg


def _run(cfg, *, output: str | None, force: bool, quiet: bool) -> int:
    from .batch import run_batch

    result = run_batch(cfg, output_dir=output, force=force, progress=not quiet)
    rows = result.rows
    _print_table(rows)
    out = (Path(output) if output else cfg.output_path()).resolve()
    n_fail = sum(r.status != "ok" for r in rows)
    print(f"\n{len(rows) - n_fail} of {len(rows)} inputs ok. Results: {out}  Report: {out / 'report.html'}")
    return EXIT_SOME_FAILED if n_fail else EXIT_OK


def _cmd_simulate(args) -> int:
    from .simulate.scene import simulate_from_recipe

    for recipe in args.recipes:
        out = args.output or str(Path(recipe).resolve().parent)
        written = simulate_from_recipe(recipe, out, seed=args.seed)
        for path in written:
            print(path)
    return EXIT_OK


def _cmd_demo(args) -> int:
    from .simulate.scene import simulate_from_recipe

    root = Path(args.root).resolve()
    config = root / "configs" / "demo.yaml"
    recipes = sorted((root / "synthetic_movies").glob("demo_*.yaml"))
    if not config.is_file() or not recipes:
        print(
            f"msdkit demo: configs/demo.yaml or synthetic_movies/demo_*.yaml not found under {root}. "
            "Run the command from the msdkit project folder or pass --root.",
            file=sys.stderr,
        )
        return EXIT_INVALID
    movie_dir = root / "synthetic_movies" / "demo"
    for recipe in recipes:
        if not list(movie_dir.glob(f"{recipe.stem}*.ome.tif")):
            print(f"rendering demo movie from {recipe.relative_to(root)} ...", flush=True)
            simulate_from_recipe(recipe, movie_dir)
    cfg = _load(str(config), executor=args.executor)
    rc = _run(cfg, output=args.output, force=False, quiet=False)
    print("Ground truth for each movie: synthetic_movies/demo/*_truth.json")
    return rc


def _cmd_check(args) -> int:
    cfg = _load(args.config)
    paths = cfg.input_paths()
    missing = [p for p in paths if not p.exists()]
    print(f"{args.config}: valid. {len(paths)} input(s); output folder {cfg.output_path()}")
    for p in paths:
        print(f"  {'MISSING ' if p in missing else ''}{p}")
    return EXIT_SOME_FAILED if missing or not paths else EXIT_OK


def _cmd_report(args) -> int:
    from .report import write_report

    path = write_report(Path(args.output_dir))
    print(path)
    return EXIT_OK


def end_process(code: int) -> None:
    """End the process with ``code`` once a run's results are written, skipping the interpreter's teardown.

    A process that ran an analysis holds numba's compiled code, scipy, matplotlib and pandas; tearing them
    down (module by module, then LLVM's own clean-up) takes about half a second after the last file is written.
    The exit handlers still run (``atexit``: logging flushes and closes msdkit.log) and standard output and
    error are flushed; only the freeing of memory the system takes back anyway is skipped. Returns without
    ending anything when called from another thread than the main one, or while a thread that the
    interpreter would wait for (not a daemon) is still running: the process then exits the usual way.
    """
    import atexit
    import os
    import threading

    main = threading.main_thread()
    if threading.current_thread() is not main:
        return
    if any(t is not main and t.is_alive() and not t.daemon for t in threading.enumerate()):
        return
    atexit._run_exitfuncs()  # what the interpreter runs at exit: logging.shutdown and the other handlers
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (OSError, ValueError, AttributeError):  # closed or missing stream, broken pipe
            pass
    os._exit(code)


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``msdkit`` console script; returns the exit code.

    Called without ``argv`` (the command line of the process: the console script, ``python -m msdkit``),
    ``msdkit run`` ends the process when its results are written (:func:`end_process`); called with
    ``argv`` it returns the code.
    """
    from .errors import ConfigError

    parser = _parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # argparse: 2 for usage errors, 0 for --help/--version
        return int(exc.code or 0)
    logging.basicConfig(level=logging.WARNING, format="%(levelname)s %(name)s: %(message)s")
    try:
        if args.command == "run":
            from ._memory import share_one_heap

            share_one_heap()  # before any thread starts: the analyses reuse freed memory (msdkit._memory)
            cfg = _load(args.config, executor=args.executor, workers=args.workers)
            code = _run(cfg, output=args.output, force=args.force, quiet=args.quiet)
            if argv is None:  # the msdkit program itself (console script, python -m msdkit)
                end_process(code)
            return code
        if args.command == "simulate":
            return _cmd_simulate(args)
        if args.command == "demo":
            return _cmd_demo(args)
        if args.command == "check":
            return _cmd_check(args)
        if args.command == "report":
            return _cmd_report(args)
    except ConfigError as exc:
        print(f"msdkit: invalid config:\n{exc}", file=sys.stderr)
        return EXIT_INVALID
    except KeyboardInterrupt:
        print("msdkit: interrupted; completed inputs are kept and a rerun resumes.", file=sys.stderr)
        return 130
    return EXIT_INVALID


def entry() -> None:
    """Console-script wrapper that exits with :func:`main`'s code."""
    sys.exit(main())


if __name__ == "__main__":  # pragma: no cover
    entry()
