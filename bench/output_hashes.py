"""SHA-256 of every file the demo and each example produce (behaviour-preserving refactors keep them identical).

Usage::

    .venv/bin/python bench/output_hashes.py --write bench/output_hashes.json    # record a baseline
    .venv/bin/python bench/output_hashes.py --compare bench/output_hashes.json  # compare against it

``timings.json`` is left out (it holds wall-clock times by design). Exit 1 when a compared hash differs.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def _runs():
    yield "demo", ["demo"]
    for toml in sorted((ROOT / "examples").glob("*.toml")):
        yield toml.stem, ["compile", str(toml)]
    sorter = [str(ROOT / "examples" / f"sorter-1550-{k}.toml") for k in ("unwrapper", "corrector")]
    yield "sorter-1550-pair", ["sorter", "compile", *sorter]
    for toml in sorted((ROOT / "examples" / "measure").glob("*.toml")):
        yield f"measure-{toml.stem}", ["charge", "aperture", str(toml)]


def collect() -> dict:
    hashes = {}
    with tempfile.TemporaryDirectory() as tmp:
        for name, argv in _runs():
            out = Path(tmp) / name
            proc = subprocess.run([sys.executable, "-m", "metalay.cli", *argv, "-o", str(out), "--quiet"],
                                  capture_output=True, text=True, cwd=ROOT)
            hashes[f"{name}/exit"] = str(proc.returncode)
            for f in sorted(p for p in out.rglob("*") if p.is_file() and p.name != "timings.json"):
                hashes[f"{name}/{f.relative_to(out).as_posix()}"] = hashlib.sha256(f.read_bytes()).hexdigest()
    return hashes


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    g = ap.add_mutually_exclusive_group(required=True)
    g.add_argument("--write", type=Path)
    g.add_argument("--compare", type=Path)
    args = ap.parse_args()
    now = collect()
    if args.write:
        args.write.write_text(json.dumps(now, indent=1, sort_keys=True) + "\n")
        print(f"{len(now)} entries written to {args.write}")
        return 0
    base = json.loads(args.compare.read_text())
    diff = sorted(k for k in set(base) | set(now) if base.get(k) != now.get(k))
    for k in diff:
        print(f"differs: {k}: {base.get(k, '-')[:12]} -> {now.get(k, '-')[:12]}")
    print(f"{len(now)} entries, {len(diff)} differ")
    return 1 if diff else 0


if __name__ == "__main__":
    sys.exit(main())
