"""Command line: a thin layer over the Python API. Only this package prints or exits.

================  ==========================================================  =====================================
module            commands                                                    library call
================  ==========================================================  =====================================
``__init__.py``   ``compile``, ``demo``; ``main`` (the ``metalay`` command)   :func:`metalay.api.compile_design`
``cells.py``      ``cells build | show | import | complement``                :mod:`metalay.cells.cellbuild`
``rules.py``      ``rules check``, ``info``                                   :func:`metalay.checks.rules.check_mask`
``optics.py``     ``optics``                                                  :func:`metalay.checks.optics.check_optics`
``routes.py``     ``routes etch | fork | slm | orient | compare | all``       :mod:`metalay.routes.routes`
``study.py``      ``compare``, ``tolerance``                                  :mod:`metalay.studies.study`
``sorter.py``     ``sorter plan | compile | check``                           :mod:`metalay.measure.sortermask`
``charge.py``     ``charge read | aperture | simulate``                       :mod:`metalay.measure.imagecharge`
``__main__.py``   ``python -m metalay.cli``
``_options.py``   options shared by commands (``--max-memory``)
================  ==========================================================  =====================================

Each command module exposes ``add_parser(subparsers)`` and ``run(args) -> int``. Exit codes: 0 success;
1 a compile's overall verdict reached ``--fail-at`` (default: fail), or design-rule violations when asked to fail on
them; 2 bad input; 3 unreadable mask; 70 internal error; 75 output folder busy (another metalay process writes it);
130 interrupted; 141 standard output closed early (e.g. ``metalay info mask.gds | head -1``: quiet, as a shell
reports a pipe closed under a process) (:mod:`metalay.errors` gives each error class its code).
"""

from __future__ import annotations

import os

# One BLAS thread per process: the unit-cell solver's small dense matrices run several times slower with threaded
# BLAS on a shared 2-core machine, and metalay parallelises over tiles and samples itself.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import argparse
import contextlib
import importlib
import sys
from importlib import resources
from pathlib import Path

from metalay import __version__
from metalay.cli._options import add_max_memory
from metalay.cli._output import SHORT_CAUTION, add_to_every_command, detail, json_result, say, tell
from metalay.errors import MetalayError

__all__ = ["main"]

#: Optional command modules: each exposes add_parser(subparsers) and run(args) -> int.
_COMMAND_MODULES = ("cells", "rules", "optics", "routes", "study", "sorter", "charge")


def demo_design_path() -> Path:
    """Path of the built-in demo design file."""
    return Path(str(resources.files("metalay.designs") / "demo_vortex.toml"))


def _compile(design_path, out_dir, args) -> int:
    from metalay.api import compile_design, load_design

    design = load_design(design_path)
    result = compile_design(design, out_dir, show_progress=False if args.quiet or args.json else None,
                            run_rules=False if args.no_checks else None,
                            run_optics=False if args.no_checks else None, max_memory_bytes=args.max_memory,
                             workers=args.workers, scheduler=args.scheduler)
    args.result = _compile_result(result)
    for line in result.summary:
        if line.startswith("warning: "):
            tell(args, f"metalay: {line}")
        else:
            say(args, line)
    if "report" in result.files:
        say(args, f"report: {result.files['report']}")
    say(args, f"output folder: {result.out_dir}")
    for key, notes in sorted((k, c.get("notes", [])) for k, c in result.manifest["checks"].items()):
        for note in notes:
            detail(args, f"note ({key}): {note}")
    for key, secs in sorted(result.timings_s.items()):
        if isinstance(secs, (int, float)):
            detail(args, f"time {key}: {secs:.2f}")
    rules = result.manifest["checks"].get("rules", {})
    fail = args.fail_on_violations or design.checks.fail_on_violations
    if fail and rules.get("violations", 0):
        print(f"metalay: {rules['violations']} design-rule violations (see {result.out_dir / 'manifest.json'})",
              file=sys.stderr)
        return 1
    return _verdict_exit(result.manifest["verdicts"], args.fail_at or design.checks.fail_at, result.out_dir)


def _compile_result(result) -> dict:
    """The JSON result of ``compile``/``demo``: verdicts, counts, errors, warnings, files (paths), checks' summaries."""
    m = result.manifest
    checks = {k: {"verdict": c.get("verdict"), "status": c.get("status"), "summary": c.get("summary")}
              for k, c in m["checks"].items()}
    return {"design": m["design"]["name"], "out_dir": str(result.out_dir), "verdicts": m["verdicts"],
            "counts": m["counts"], "errors": m["errors"], "warnings": m["warnings"], "checks": checks,
            "illumination": m["illumination"], "library": m["library"]["name"],
            "files": {k: str(p) for k, p in sorted(result.files.items())}, "caution": m["caution"]}


def _verdict_exit(verdicts: dict, level: str, out_dir) -> int:
    """Exit code of a compile from its overall verdict: 1 when it reaches ``level`` (fail, warn; never: 0)."""
    from metalay.design.limits import verdict_at_least

    if verdict_at_least(verdicts["overall"], level):
        print(f"metalay: verdict {verdicts['overall']} (exit 1 at --fail-at {level}): "
              f"{'; '.join(verdicts['reasons'])} (see {out_dir / 'manifest.json'})", file=sys.stderr)
        return 1
    return 0


def _cmd_compile(args) -> int:
    return _compile(args.design, args.output or Path("out") / Path(args.design).stem, args)


def _cmd_demo(args) -> int:
    return _compile(demo_design_path(), args.output, args)


def _cmd_info(args) -> int:
    from metalay.cli.rules import run_info

    return run_info(args)


def _build_parser(modules) -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="metalay", description="Geometric-phase metasurface masks from design "
                                     "files: compile, check design rules, check the optics.")
    parser.add_argument("--version", action="version", version=f"metalay {__version__}")
    sub = parser.add_subparsers(dest="command", required=True)

    def compile_options(p):
        p.add_argument("--fail-on-violations", action="store_true",
                       help="exit 1 when the written mask breaks a design rule")
        p.add_argument("--no-checks", action="store_true", help="skip the design-rule and optics checks")
        p.add_argument("--fail-at", choices=("fail", "warn", "never"), default=None,
                       help="exit 1 when the overall verdict is this or worse (default: the design's "
                            "checks.fail_at, which defaults to fail; never: always exit 0 after writing)")
        add_max_memory(p)
        p.add_argument("--workers", type=int, default=None, metavar="N",
                       help="run the tiles (and checks that stream) on a local Dask cluster of N worker processes "
                            "(same output bytes)")
        p.add_argument("--scheduler", default=None, metavar="ADDRESS",
                       help="run the tiles (and checks that stream) on an existing Dask cluster (e.g. "
                            "tcp://host:8786); its workers must see the output folder")

    p = sub.add_parser("compile", help="compile a design file (TOML) into mask files and a manifest")
    p.add_argument("design", help="design file (.toml)")
    p.add_argument("-o", "--output", type=Path, help="output folder (default: out/<design file stem>)")
    compile_options(p)
    p.set_defaults(func=_cmd_compile)

    p = sub.add_parser("demo", help="compile the built-in demo design (charge-3 vortex, 4 deg tilt, 532 nm)")
    p.add_argument("-o", "--output", type=Path, default=Path("out") / "demo", help="output folder (default out/demo)")
    compile_options(p)
    p.set_defaults(func=_cmd_demo)

    for mod in modules:
        if hasattr(mod, "add_info_parser"):
            mod.add_info_parser(sub)
        mod.add_parser(sub)
    add_to_every_command(parser)
    return parser


def _load_modules():
    mods = []
    for name in _COMMAND_MODULES:
        try:
            mods.append(importlib.import_module(f"metalay.cli.{name}"))
        except ModuleNotFoundError as exc:
            if exc.name != f"metalay.cli.{name}":
                raise
    return mods


def _stdout_closed() -> int:
    """The reader of standard output went away (``| head``): stop quietly; point standard output at /dev/null so
    the interpreter's final flush does not complain."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        os.close(devnull)
    except (OSError, ValueError):
        pass
    return 141


def _run(args) -> tuple[int, str | None]:
    """Run the command; returns its exit code and the error line (None when it did not fail with one)."""
    try:
        return int(args.func(args) or 0), None
    except MetalayError as exc:
        msg = f"metalay: error: {exc}"
        print(msg, file=sys.stderr)
        return exc.exit_code, str(exc)
    except KeyboardInterrupt:
        print("metalay: interrupted (no partial output was left)", file=sys.stderr)
        return 130, "interrupted"
    except BrokenPipeError:
        raise
    except Exception as exc:  # an internal fault, not bad input: one line, details on request
        if os.environ.get("METALAY_DEBUG"):
            raise
        msg = (f"internal error: {type(exc).__name__}: {exc} (set METALAY_DEBUG=1 for the traceback; please "
               "report it)")
        print(f"metalay: {msg}", file=sys.stderr)
        return 70, msg


def main(argv=None) -> int:
    """Entry point of the ``metalay`` command.

    Standard output carries the result only (text, or one JSON object with ``--json``); messages, warnings,
    progress and one short caution line go to standard error (:mod:`metalay.cli._output`).
    """
    modules = _load_modules()
    parser = _build_parser(modules)
    args = parser.parse_args(argv)
    json_mode = bool(getattr(args, "json", False))
    real_stdout = sys.stdout
    try:
        if json_mode:  # whatever the command prints goes to standard error; standard output gets the JSON only
            with contextlib.redirect_stdout(sys.stderr):
                code, error = _run(args)
        else:
            code, error = _run(args)
        if error is None and (not getattr(args, "quiet", False) or json_mode):  # an error stays one line
            print(SHORT_CAUTION, file=sys.stderr)
        if json_mode:
            print(json_result(args, code, error), file=real_stdout)
            real_stdout.flush()
    except BrokenPipeError:
        return _stdout_closed()
    return code
