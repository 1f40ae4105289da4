"""Benchmark: whole-mask versus streamed design-rule and optical checks, time and peak resident memory.

For each size a flat GDSII mask is compiled (checks off) from an invented demo design (a charge-3 vortex with a
4 degree tilt on the bundled TiO2 nanofin library, 325 nm square lattice, round aperture sized for the wanted
number of sites). Then each check runs in its own subprocess (its peak is its ``VmHWM``):

* rules, whole mask: :func:`metalay.checks.steps.run_rules_on_written` with room to spare (``check_mask``);
* rules, streamed: the same step under a ``--max-memory`` too small for the whole check (bands with a halo);
* optics, whole mask: :func:`metalay.checks.optics.compile_check` (the compile's quick check);
* optics, streamed: :func:`metalay.checks.optics_stream.compile_check_streamed` (block far field).

Ratios streamed / whole are printed from the same run. A size is skipped for the whole-mask checks when
``--whole-up-to`` is below it. With ``--baseline PATH`` (another checkout of metalay, e.g. ``git worktree add
/tmp/base <commit>``) both rules checks also run with that checkout's code on the same mask, one after the other
with ours, and the ratios ours / baseline are printed (``--repeat`` runs each check several times, the fastest
counts). Each check also reports its processor time (user + system, all threads): on a machine shared with other
work it varies less than the wall time.

    .venv/bin/python bench/bench_stream_checks.py                       # 1e6 and 1e7 sites
    .venv/bin/python bench/bench_stream_checks.py --sites 1e6           # quick
    .venv/bin/python bench/bench_stream_checks.py --sites 1e8 --whole-up-to 1e7 --stream-budget 1G
    .venv/bin/python bench/bench_stream_checks.py --baseline-src /tmp/base --repeat 3   # against an older checkout
    .venv/bin/python bench/bench_stream_checks.py --sites 1e6 1e7 --baseline /tmp/base --repeat 2
"""

from __future__ import annotations

import argparse
import json
import math
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, os.environ.get("METALAY_BENCH_SRC") or str(ROOT))  # a baseline's source for its child runs

PERIOD_NM = 325.0

DESIGN = """[design]
name = "bench-stream"
wavelength_nm = 532.0
input_spin = 1
library = "tio2-nanofin-532"

[[phase]]
kind = "vortex"
charge = 3

[[phase]]
kind = "tilt"
angle_deg = 4.0

[aperture]
shape = "circle"
diameter_um = {diameter_um}

[lattice]
kind = "square"
period_nm = 325.0

[mask]
formats = ["gds"]

[checks]
rules = false
optics = false
"""


def peak_mb() -> float:
    """Peak resident size of this process (``VmHWM``: ``ru_maxrss`` would carry the parent's peak across exec)."""
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024.0
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def child(kind: str, folder: str, budget: int | None) -> None:
    """Run one check on ``folder``'s mask and print a JSON line with seconds and peak MB."""
    from dataclasses import replace

    from metalay.cells.library import load_library
    from metalay.checks import optics, optics_stream, steps
    from metalay.design.spec import load_design
    from metalay.mask.steps import WrittenMask

    design = load_design(Path(folder) / "design.toml")
    lib = load_library(design.library)
    gds = next((Path(folder) / "out").glob("*.gds"))
    written = replace(WrittenMask(gds, lib, design), max_memory_bytes=budget)
    base = peak_mb()
    t0, c0 = time.perf_counter(), time.process_time()
    if kind == "rules":
        d = steps.run_rules_on_written(written)
        info = {"method": d["method"]["method"] + (f" ({d['method']['bands']} bands)" if "bands" in d["method"]
                                                   else ""), "violations": d["violations"]}
    elif kind == "optics_whole":
        d = optics.compile_check(gds, lib, design)
        info = {"method": "whole-mask", "converted": d["figures"]["power_budget"]["converted"],
                "designed_spot": d["figures"].get("designed_spot_efficiency")}
    else:
        d = optics_stream.compile_check_streamed(gds, lib, design)
        info = {"method": d["method"]["method"], "converted": d["figures"]["power_budget"]["converted"],
                "designed_spot": d["figures"].get("designed_spot_efficiency"),
                "designed_spot_bound": d["figures"].get("designed_spot_efficiency_bound"),
                "block_um": d["method"]["block_um"],
                "fringe_charge": d["figures"].get("fringe_reading", {}).get("charge", "not computed")}
    print(json.dumps({"s": time.perf_counter() - t0, "cpu_s": time.process_time() - c0, "peak_mb": peak_mb(),
                      "import_mb": base, **info}))


def run_child(kind: str, folder: str, budget: int | None, root: Path = ROOT, repeat: int = 1,
              src: str | None = None) -> dict:
    """One check in its own process (the fastest of ``repeat`` runs), with the code of checkout ``root`` (or of the
    package folder ``src``)."""
    cmd = [sys.executable, str(root / "bench" / Path(__file__).name), "--child", kind, folder] + (
        ["--budget", str(budget)] if budget else [])
    env = {**os.environ, "OPENBLAS_NUM_THREADS": "1"}
    if src:
        env["METALAY_BENCH_SRC"] = src
    best = None
    for _ in range(repeat):
        out = subprocess.run(cmd, capture_output=True, text=True, env=env)
        if out.returncode != 0:
            return {"error": (out.stderr.strip().splitlines() or ["?"])[-1]}
        got = json.loads(out.stdout.strip().splitlines()[-1])
        best = got if best is None or got["s"] < best["s"] else best
    return best


def compare_baseline(folder: str, budgets: dict, baseline: Path, repeat: int) -> None:
    """Rules checks with the baseline checkout's code and ours, alternately, on the same mask; ratios."""
    for name, budget in budgets.items():
        base = run_child("rules", folder, budget, baseline, repeat)
        ours = run_child("rules", folder, budget, ROOT, repeat)
        print(f"  rules {name:<9} baseline {fmt(base)}")
        print(f"  rules {name:<9} ours     {fmt(ours)}")
        if "error" not in base and "error" not in ours:
            cpu = (f", cpu {ours['cpu_s'] / base['cpu_s']:.2f}x" if "cpu_s" in ours and "cpu_s" in base else "")
            print(f"  rules {name:<9} ours / baseline  time {ours['s'] / base['s']:.2f}x{cpu}, peak "
                  f"{ours['peak_mb'] / base['peak_mb']:.2f}x, violations {base['violations']} and "
                  f"{ours['violations']} ({'same' if base['violations'] == ours['violations'] else 'DIFFERENT'})")


def make_mask(folder: Path, sites: float) -> dict:
    from metalay.api import compile_design
    from metalay.design.spec import load_design

    diameter_um = 2 * PERIOD_NM * 1e-3 * math.sqrt(sites / math.pi)
    (folder / "design.toml").write_text(DESIGN.format(diameter_um=round(diameter_um, 3)))
    t0 = time.perf_counter()
    res = compile_design(load_design(folder / "design.toml"), folder / "out", show_progress=False)
    gds = res.files["gds"]
    return {"diameter_um": diameter_um, "sites": res.manifest["counts"]["sites"] if "counts" in res.manifest
            else None, "compile_s": time.perf_counter() - t0, "gds_mb": gds.stat().st_size / 1e6}


def streamed_optics_rows(folder: str, baseline: str | None, repeat: int) -> dict:
    """The streamed optical check (and the baseline's, alternating run by run so both see the same load): the
    median run of each by time."""
    runs: dict = {"optics streamed": []}
    if baseline:
        runs["optics streamed (baseline)"] = []
    for _ in range(max(1, repeat)):
        runs["optics streamed"].append(run_child("optics_stream", folder, None))
        if baseline:
            runs["optics streamed (baseline)"].append(run_child("optics_stream", folder, None, src=baseline))
    rows = {}
    for name, rs in runs.items():
        ok = sorted((r for r in rs if "error" not in r), key=lambda r: r["s"])
        rows[name] = ok[len(ok) // 2] if ok else rs[0]
        if len(ok) > 1:
            rows[name]["method"] += f"; {len(ok)} runs {ok[0]['s']:.1f}-{ok[-1]['s']:.1f} s"
        if ok and "fringe_charge" in ok[0]:
            rows[name]["method"] += f"; fringe charge {ok[0]['fringe_charge']}"
    return rows


def fmt(r: dict) -> str:
    if "error" in r:
        return f"FAILED ({r['error'][:90]})"
    cpu = f" (cpu {r['cpu_s']:5.1f} s)" if "cpu_s" in r else ""
    return f"{r['s']:7.1f} s{cpu} {r['peak_mb']:7.0f} MB (after imports {r['import_mb']:4.0f} MB)  [{r['method']}]"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sites", type=float, nargs="*", default=[1e6, 1e7])
    ap.add_argument("--whole-up-to", type=float, default=1e7, help="largest size for the whole-mask checks")
    ap.add_argument("--stream-budget", help="--max-memory of the streamed rules, small enough to force bands "
                    "(default: 30 B per site, at least 50M, at most 1G)")
    ap.add_argument("--keep", help="folder to keep the masks in (default: a temporary folder)")
    ap.add_argument("--baseline-src", help="folder holding an older metalay package (e.g. `git archive <commit> "
                    "metalay | tar -x -C DIR`): its streamed optical check runs too, alternating with this one "
                    "(--repeat times each), and the ratio is printed")
    ap.add_argument("--baseline", type=Path,
                    help="another metalay checkout: run only the rules checks, with its code and ours")
    ap.add_argument("--repeat", type=int, default=1, help="runs of each check compared with a baseline (rules: the "
                    "fastest counts; streamed optics: the median is shown)")
    ap.add_argument("--child", nargs=2, help=argparse.SUPPRESS)
    ap.add_argument("--budget", type=int, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        child(args.child[0], args.child[1], args.budget)
        return
    from metalay.util.budget import parse_memory_size

    print(f"python {sys.version.split()[0]}, {os.cpu_count()} cores; each check in its own subprocess")
    with tempfile.TemporaryDirectory(dir=args.keep) as tmp:
        for sites in args.sites:
            folder = Path(tmp) / f"s{sites:.0e}"
            folder.mkdir()
            m = make_mask(folder, sites)
            print(f"\n{sites:.0e} sites: aperture {m['diameter_um']:.0f} um, GDSII {m['gds_mb']:.0f} MB, compiled "
                  f"in {m['compile_s']:.1f} s")
            rows = {}
            if sites <= args.whole_up_to:
                rows["rules whole"] = run_child("rules", str(folder), 1 << 40)
                rows["optics whole"] = run_child("optics_whole", str(folder), None)
            stream_budget = (parse_memory_size(args.stream_budget) if args.stream_budget
                             else int(min(max(50e6, 30 * sites), 1e9)))
            if args.baseline:
                budgets = {"whole": 1 << 40, "streamed": stream_budget} if sites <= args.whole_up_to else {
                    "streamed": stream_budget}
                compare_baseline(str(folder), budgets, args.baseline.resolve(), args.repeat)
                continue
            print(f"  streamed rules under --max-memory {stream_budget / 1e6:.0f} MB")
            rows["rules streamed"] = run_child("rules", str(folder), stream_budget)
            rows.update(streamed_optics_rows(str(folder), args.baseline_src, args.repeat))
            for name, r in rows.items():
                print(f"  {name:<16} {fmt(r)}")
            for kind in ("rules", "optics"):
                w, s = rows.get(f"{kind} whole"), rows[f"{kind} streamed"]
                if w and "error" not in w and "error" not in s:
                    print(f"  {kind}: streamed / whole  time {s['s'] / w['s']:.2f}x, "
                          f"peak {s['peak_mb'] / w['peak_mb']:.2f}x")
            both = [rows[k] for k in ("rules streamed", "optics streamed")]
            if all("error" not in r for r in both):
                print(f"  streamed rules + optics: {sum(r['s'] for r in both):.1f} s, peak "
                      f"{max(r['peak_mb'] for r in both):.0f} MB (separate processes; one after the other)")
            w = rows.get("rules whole")
            if w and "error" not in w and "error" not in rows["rules streamed"]:
                same = w["violations"] == rows["rules streamed"]["violations"]
                print(f"  rule violations whole {w['violations']}, streamed {rows['rules streamed']['violations']}"
                      f" ({'same' if same else 'DIFFERENT'})")
            b = rows.get("optics streamed (baseline)")
            if b and "error" not in b and "error" not in rows["optics streamed"]:
                print(f"  optics streamed: this / baseline  time {rows['optics streamed']['s'] / b['s']:.2f}x, "
                      f"peak {rows['optics streamed']['peak_mb'] / b['peak_mb']:.2f}x")
            o = rows.get("optics whole")
            s = rows["optics streamed"]
            if o and "error" not in o and "error" not in s:
                print(f"  converted whole {o['converted']:.6f}, streamed {s['converted']:.6f}; designed spot whole "
                      f"{o['designed_spot']}, streamed {s['designed_spot']} +- {s['designed_spot_bound']:.2g} "
                      f"(block {s['block_um']:.3g} um)")


if __name__ == "__main__":
    main()
