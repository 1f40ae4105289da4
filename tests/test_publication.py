"""Output integrity: the output folder appears whole or not at all, a second writer is refused, a killed run leaves
the previous set intact and its litter is removed by the next run.

Common practice (no source): a published set of outputs must never mix files of two runs; the check below is that
every file the manifest lists has the SHA-256 the manifest records and no other file is there.
"""

import copy
import hashlib
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from metalay.api import compile_design, load_design
from metalay.errors import OutputBusyError, OutputError
from metalay.util.atomic import published_folder

from conftest import SMALL_DESIGN, write_toml


def _design(tmp_path, name, charge):
    d = copy.deepcopy(SMALL_DESIGN)
    d["phase"][0]["charge"] = charge
    d["mask"]["label"] = False
    return write_toml(tmp_path / f"{name}.toml", d)


def _consistent_set(folder: Path) -> int:
    """The charge of the complete set in ``folder``; fails on a partial or mixed set."""
    manifest = json.loads((folder / "manifest.json").read_text())
    listed = {info["name"]: info["sha256"] for info in manifest["files"].values()}
    for name, sha in listed.items():
        assert hashlib.sha256((folder / name).read_bytes()).hexdigest() == sha, name
    present = {p.name for p in folder.iterdir()}
    assert present == set(listed) | {"manifest.json", "timings.json"}, present
    return manifest["design"]["echo"]["phase"][0]["charge"]


def _litter(parent: Path) -> list:
    return sorted(p.name for p in parent.iterdir() if ".metalay-" in p.name)


def _start(design, out, tmp_path, pause=None):
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1")
    if pause:
        env.update(METALAY_PAUSE_AT=pause, METALAY_PAUSE_FILE=str(tmp_path / "hook"))
    return subprocess.Popen([sys.executable, "-m", "metalay.cli", "compile", str(design), "-o", str(out), "--quiet"],
                            env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _wait_for(path: Path, proc, timeout_s=120.0):
    t0 = time.monotonic()
    while not path.exists():
        assert proc.poll() is None, proc.communicate()
        assert time.monotonic() - t0 < timeout_s, f"{path} never appeared"
        time.sleep(0.02)


def test_kill_at_every_stage_boundary_keeps_the_previous_set(tmp_path):
    parent = tmp_path / "runs"
    out = parent / "mask"
    a, b = _design(tmp_path, "a", 3), _design(tmp_path, "b", 5)
    compile_design(load_design(a), out, show_progress=False)
    assert _consistent_set(out) == 3 and _litter(parent) == []
    for point in ("staged", "written", "checked", "complete", "switched"):
        proc = _start(b, out, tmp_path, pause=point)
        _wait_for(tmp_path / f"hook.{point}", proc)
        proc.send_signal(signal.SIGKILL)
        proc.wait()
        (tmp_path / f"hook.{point}").unlink()
        # never a partial or mixed set: before the switch the previous one, after it the new one
        assert _consistent_set(out) == (5 if point == "switched" else 3), point
        assert _litter(parent), point  # the killed run left its stage folder and lock file
        if point == "switched":
            compile_design(load_design(a), out, show_progress=False)  # back to set a for the next kills
            assert _litter(parent) == []
    # the next run removes the dead run's litter (its lock is free, so it is known to be dead)
    compile_design(load_design(b), out, show_progress=False)
    assert _consistent_set(out) == 5
    assert _litter(parent) == [] and sorted(p.name for p in parent.iterdir()) == ["mask"]


def test_second_writer_stops_at_once_and_the_first_publishes_its_set(tmp_path):
    out = tmp_path / "mask"
    a, b = _design(tmp_path, "a", 3), _design(tmp_path, "b", 5)
    first = _start(a, out, tmp_path, pause="written")
    _wait_for(tmp_path / "hook.written", first)
    second = _start(b, out, tmp_path)
    _, err = second.communicate(timeout=120)
    assert second.returncode == 75
    assert err.count("\n") == 1 and "another metalay process" in err and str(first.pid) in err
    (tmp_path / "hook.written.go").touch()
    assert first.wait(timeout=120) == 0
    assert _consistent_set(out) == 3
    assert _litter(tmp_path) == []
    with pytest.raises(OutputBusyError):  # the same from Python: the lock is per folder
        with published_folder(out):
            with published_folder(out):
                pass


def test_racing_compiles_never_publish_a_mixed_set(tmp_path):
    out = tmp_path / "mask"
    a, b = _design(tmp_path, "a", 3), _design(tmp_path, "b", 5)
    for _ in range(2):
        procs = [_start(a, out, tmp_path), _start(b, out, tmp_path)]
        codes = [p.wait(timeout=300) for p in procs]
        assert sorted(codes) in ([0, 0], [0, 75]), [p.communicate() for p in procs]
        assert _consistent_set(out) in (3, 5)
        assert _litter(tmp_path) == []


def test_failed_run_leaves_no_folder_and_a_foreign_folder_is_not_replaced(tmp_path):
    from metalay.cli import main

    design = _design(tmp_path, "a", 3)
    out = tmp_path / "new" / "deeper" / "mask"
    with pytest.raises(OutputError):  # the failure happens inside: nothing is created, not even the parents
        with published_folder(out) as stage:
            (stage / "x").write_text("partial")
            raise OutputError("stop")
    assert not (tmp_path / "new").exists()
    foreign = tmp_path / "documents"
    foreign.mkdir()
    (foreign / "notes.txt").write_text("mine")
    assert main(["compile", str(design), "-o", str(foreign), "--quiet"]) == 2
    assert sorted(p.name for p in foreign.iterdir()) == ["notes.txt"] and _litter(tmp_path) == []
    empty = tmp_path / "empty"
    empty.mkdir()
    assert main(["compile", str(design), "-o", str(empty), "--quiet"]) == 0
    assert _consistent_set(empty) == 3
    umask = os.umask(0)
    os.umask(umask)
    assert (empty.stat().st_mode & 0o777) == (0o777 & ~umask)  # a normal folder, not a private temporary one


def test_dead_stage_folders_are_removed_and_an_interrupted_switch_is_undone(tmp_path):
    out = tmp_path / "mask"
    design = _design(tmp_path, "a", 3)
    compile_design(load_design(design), out, show_progress=False)
    dead = tmp_path / ".mask.metalay-stage-99999-dead"
    (dead / "optics").mkdir(parents=True)
    (dead / "optics" / "junk.png").write_bytes(b"x" * 1000)
    (tmp_path / ".mask.metalay-lock").write_text("99999\n")  # a lock file nobody holds
    # a two-rename switch interrupted between its renames: the previous set is aside, the folder missing
    os.rename(out, tmp_path / ".mask.metalay-old-99999")
    with published_folder(out) as stage:
        assert _consistent_set(out) == 3  # restored before anything else
        (stage / "manifest.json").write_text(json.dumps({"metalay_manifest_version": 1, "files": {},
                                                         "design": {"echo": {"phase": [{"charge": 7}]}}}))
        (stage / "timings.json").write_text("{}")
    assert _consistent_set(out) == 7
    assert _litter(tmp_path) == []
