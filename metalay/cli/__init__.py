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
import importlib
import sys
from importlib import resources
from pathlib import Path

from metalay import __version__
from metalay.cli._options import add_max_memory
from metalay.errors import MetalayError

__all__ = ["main"]

#: Optional command modules: each exposes add_parser(subparsers) and run(args) -> int.
_COMMAND_MODULES = ("cells", "rules", "optics", "routes", "study", "sorter", "charge")


def demo_design_path() -> Path:
    """Path of the built-in demo design file."""
    return Path(str(resources.files("metalay.designs") / "demo_vortex.toml"))


def _compile(design_path, out_dir, args) -> int:
    from metalay.api import SAFETY_CAUTION, compile_design, load_design

    design = load_design(design_path)
    result = compile_design(design, out_dir, show_progress=False if args.quiet else None,
                            run_rules=False if args.no_checks else None,
                            run_optics=False if args.no_checks else None, max_memory_bytes=args.max_memory)
    if not args.quiet:
        for line in result.summary:
            print(line)
        print(f"output folder: {result.out_dir}")
        print(SAFETY_CAUTION)
    rules = result.manifest["checks"].get("rules", {})
    fail = args.fail_on_violations or design.checks.fail_on_violations
    if fail and rules.get("violations", 0):
        print(f"metalay: {rules['violations']} design-rule violations (see {result.out_dir / 'manifest.json'})",
              file=sys.stderr)
        return 1
    return _verdict_exit(result.manifest["verdicts"], args.fail_at or design.checks.fail_at, result.out_dir)


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
        p.add_argument("--quiet", action="store_true", help="no progress bar and no summary")
        p.add_argument("--fail-on-violations", action="store_true",
                       help="exit 1 when the written mask breaks a design rule")
        p.add_argument("--no-checks", action="store_true", help="skip the design-rule and optics checks")
        p.add_argument("--fail-at", choices=("fail", "warn", "never"), default=None,
                       help="exit 1 when the overall verdict is this or worse (default: the design's "
                            "checks.fail_at, which defaults to fail; never: always exit 0 after writing)")
        add_max_memory(p)

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


def main(argv=None) -> int:
    """Entry point of the ``metalay`` command."""
    modules = _load_modules()
    parser = _build_parser(modules)
    args = parser.parse_args(argv)
    try:
        return int(args.func(args) or 0)
    except BrokenPipeError:
        return _stdout_closed()
    except MetalayError as exc:
        print(f"metalay: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("metalay: interrupted (no partial output was left)", file=sys.stderr)
        return 130
    except Exception as exc:  # an internal fault, not bad input: one line, details on request
        if os.environ.get("METALAY_DEBUG"):
            raise
        print(f"metalay: internal error: {type(exc).__name__}: {exc} (set METALAY_DEBUG=1 for the traceback; "
              "please report it)", file=sys.stderr)
        return 70
