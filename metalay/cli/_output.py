"""Where the command line writes what (used only inside :mod:`metalay.cli`).

* standard output: the result. As text (a summary) by default; with ``--json`` one JSON object and nothing else
  (every command; :func:`json_result` builds it from ``args.result``, which a command sets, plus ``command``,
  ``exit_code``, ``error`` when it failed, and the full ``caution``).
* standard error: messages, warnings, notes, progress bars, errors, and one short caution line per command.
* ``--quiet``: no text summary, no messages (errors still); ``--verbose``: notes and timings too.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from pathlib import Path

__all__ = ["SHORT_CAUTION", "full_caution", "add_output_options", "add_to_every_command", "say", "tell",
           "detail", "json_result", "command_name"]

#: The one line every command prints on standard error (the full text is in every report, manifest and JSON result).
SHORT_CAUTION = ("metalay: caution: a design aid, not a sign-off: verify with full-wave simulation and your "
                 "facility's process rules; follow laser and chemical safety rules (full text in reports and --json)")

_ACTION_KEYS = ("rules_command", "cells_command", "route_action", "sorter_action", "charge_action")


def full_caution() -> str:
    """The full safety caution (the text of every manifest)."""
    from metalay.mask.compile import SAFETY_CAUTION

    return SAFETY_CAUTION


def add_output_options(p: argparse.ArgumentParser) -> None:
    """Add ``--json``, ``--quiet`` and ``--verbose`` to a command parser (those it does not define already)."""
    have = set(p._option_string_actions)
    if "--json" not in have:
        p.add_argument("--json", action="store_true",
                       help="print the result as one JSON object on standard output (messages go to standard error)")
    if "--quiet" not in have:
        p.add_argument("--quiet", action="store_true", help="print nothing but errors (and the result with --json)")
    if "--verbose" not in have:
        p.add_argument("--verbose", action="store_true", help="also print notes and timings (standard error)")


def add_to_every_command(parser: argparse.ArgumentParser) -> None:
    """Walk the parser tree and give every leaf command the output options."""
    subs = [a for a in parser._actions if isinstance(a, argparse._SubParsersAction)]
    if not subs:
        add_output_options(parser)
        return
    for action in subs:
        for child in dict.fromkeys(action.choices.values()):
            add_to_every_command(child)


def say(args, line: str = "") -> None:
    """A line of the text result (standard output), unless ``--quiet`` or ``--json``."""
    if not getattr(args, "quiet", False) and not getattr(args, "json", False):
        print(line)


def tell(args, line: str) -> None:
    """A message or warning (standard error), unless ``--quiet``."""
    if not getattr(args, "quiet", False):
        print(line, file=sys.stderr)


def detail(args, line: str) -> None:
    """A detail shown with ``--verbose`` (standard error)."""
    if getattr(args, "verbose", False):
        print(line, file=sys.stderr)


def command_name(args) -> str:
    """``"rules check"``, ``"compile"``...: the command and its action."""
    parts = [str(getattr(args, "command", "") or "")]
    parts += [str(getattr(args, k)) for k in _ACTION_KEYS if getattr(args, k, None)]
    return " ".join(p for p in parts if p)


def _plain(obj):
    """JSON-ready copy: numpy scalars and arrays to Python, paths to text, non-finite floats to None."""
    if isinstance(obj, dict):
        return {str(k): _plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple, set, frozenset)):
        seq = sorted(obj, key=str) if isinstance(obj, (set, frozenset)) else obj
        return [_plain(v) for v in seq]
    if isinstance(obj, Path):
        return str(obj)
    if hasattr(obj, "tolist") and not isinstance(obj, (str, bytes)):
        return _plain(obj.tolist())
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    if isinstance(obj, (str, int, float, bool)) or obj is None:
        return obj
    return str(obj)


def json_result(args, exit_code: int, error: str | None = None) -> str:
    """The JSON text of a command's result: ``args.result`` (set by the command) with ``command``, ``exit_code``,
    ``error`` (when it failed) and the full ``caution``."""
    result = dict(getattr(args, "result", None) or {})
    result.setdefault("command", command_name(args))
    result["exit_code"] = int(exit_code)
    if error is not None:
        result["error"] = error
    result.setdefault("caution", full_caution())
    return json.dumps(_plain(result), indent=2, sort_keys=True, allow_nan=False)
