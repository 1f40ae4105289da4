"""A compile on a Dask cluster: tiles as tasks, parts merged in order, files byte-identical to one process.

The oracle is the single-process compile of the same design file (its own GDSII and OASIS writers are checked against
gdstk in tests/test_compile_streams.py): the cluster route must give the same bytes. Clusters here are small
(two in-process workers, or two local worker processes through the command line) to keep each test to seconds.
"""

import copy
import os
import subprocess
import sys
import time
from pathlib import Path

import pytest
from distributed import LocalCluster

import metalay.mask.cluster as cl
from metalay.api import compile_design, load_design
from metalay.cli import main

from conftest import SMALL_DESIGN, write_toml

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="module")
def cluster():
    # two workers of one thread each, in this process (no worker start-up cost); tasks still go through the
    # scheduler, with its retries and its completion order
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=False, dashboard_address=None) as c:
        yield c


def _design(tmp_path, **mask):
    d = copy.deepcopy(SMALL_DESIGN)
    d["aperture"]["diameter_um"] = 30.0
    d["mask"].update({"formats": ["gds", "oas"], "label": True}, **mask)
    return write_toml(tmp_path / "d.toml", d)


def _files(folder: Path) -> dict:
    return {p.relative_to(folder).as_posix(): p.read_bytes() for p in sorted(folder.rglob("*"))
            if p.is_file() and p.name != "timings.json"}


@pytest.mark.parametrize("mask", [{}, {"rotation_levels": 8, "hierarchy": "levels"},
                                  {"tone": "complement", "complement_band_rows": 6}])
def test_cluster_output_is_byte_identical(tmp_path, cluster, monkeypatch, mask):
    import metalay.mask.compile as C

    path = _design(tmp_path, **mask)
    one = compile_design(load_design(path), tmp_path / "one", show_progress=False, sites_per_tile=1_500)
    steps = []

    class Bar:  # records what the progress bar on stderr is told
        def update(self, n):
            steps.append(n)

        def close(self):
            steps.append("closed")

    monkeypatch.setattr(C, "progress", lambda **kw: Bar())
    two = compile_design(load_design(path), tmp_path / "two", show_progress=True, sites_per_tile=1_500,
                         scheduler=cluster.scheduler_address)
    tiles = one.manifest["counts"]["tiles"]
    assert tiles >= 5
    assert _files(tmp_path / "one") == _files(tmp_path / "two")  # mask files and manifest, byte for byte
    assert two.files["oas"].stat().st_size > 0 and not (tmp_path / "two" / ".parts").exists()
    # progress came back from the cluster: one step per finished task, then the bar closed
    assert steps == [1] * tiles + ["closed"]


def test_failed_task_is_retried_and_output_unchanged(tmp_path, cluster, monkeypatch):
    path = _design(tmp_path)
    compile_design(load_design(path), tmp_path / "one", show_progress=False, sites_per_tile=1_500)
    real = cl._write_part
    calls = {"failed": 0, "tile-00000002": 0}

    def flaky(part_path, parts):  # tile 2 fails once, after writing half its part under the temporary name
        if part_path.name.startswith("tile-00000002"):
            calls["tile-00000002"] += 1
            if calls["failed"] == 0:
                calls["failed"] += 1
                raise OSError("injected one-time failure of tile 2")
        return real(part_path, parts)

    monkeypatch.setattr(cl, "_write_part", flaky)
    compile_design(load_design(path), tmp_path / "two", show_progress=False, sites_per_tile=1_500,
                   scheduler=cluster.scheduler_address)
    assert calls == {"failed": 1, "tile-00000002": 2}
    assert _files(tmp_path / "one") == _files(tmp_path / "two")


def test_task_failing_every_time_publishes_nothing(tmp_path, cluster, monkeypatch):
    from metalay.errors import OutputError

    path = _design(tmp_path)
    real = cl._write_part
    tries = []

    def broken(part_path, parts):
        if part_path.name.startswith("tile-00000001"):
            tries.append(1)
            raise OSError("injected failure of tile 1")
        return real(part_path, parts)

    monkeypatch.setattr(cl, "_write_part", broken)
    with pytest.raises(OutputError, match="injected failure of tile 1"):
        compile_design(load_design(path), tmp_path / "out", show_progress=False, sites_per_tile=1_500,
                       scheduler=cluster.scheduler_address)
    assert len(tries) == 1 + cl.TASK_RETRIES
    assert sorted(p.name for p in tmp_path.iterdir()) == ["d.toml"]  # no output, no stage, no parts, no lock


def test_bad_scheduler_address_is_one_line(tmp_path, capsys, monkeypatch):
    monkeypatch.setattr(cl, "CONNECT_TIMEOUT_S", 2.0)
    path = _design(tmp_path)
    t0 = time.perf_counter()
    code = main(["compile", str(path), "-o", str(tmp_path / "o"), "--quiet", "--scheduler", "tcp://127.0.0.1:9"])
    # Common practice (no source): a scheduler that does not answer ends the run after the timeout, not a hang
    assert time.perf_counter() - t0 < 30
    assert code == 2
    err = capsys.readouterr().err.strip()
    assert "--scheduler" in err and "tcp://127.0.0.1:9" in err and "d.toml" in err and "\n" not in err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["d.toml"]
    assert main(["compile", str(path), "-o", str(tmp_path / "o"), "--quiet", "--workers", "0"]) == 2
    err = capsys.readouterr().err.strip()
    assert "--workers" in err and "1 to 256" in err and "\n" not in err


def test_local_worker_processes_from_the_command_line(tmp_path):
    # real worker processes: the tile function, the design and the library travel pickled to other interpreters
    path = _design(tmp_path, rotation_levels=8, hierarchy="levels")
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    runs = {}
    for name, extra in (("one", []), ("two", ["--workers", "2"])):
        proc = subprocess.run([sys.executable, "-m", "metalay.cli", "compile", str(path), "-o", str(tmp_path / name),
                               "--quiet", *extra], capture_output=True, text=True, cwd=ROOT, env=env, timeout=300)
        assert proc.returncode == 0, proc.stderr
        runs[name] = _files(tmp_path / name)
    assert runs["one"] == runs["two"] and "d.gds" not in runs["one"] and "t-small.oas" in runs["one"]
