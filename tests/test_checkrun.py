"""A compile's checks run one after another, side by side (a child process per check beyond the first) or as tasks
on its Dask cluster: the same manifest, byte for byte, whichever way; errors and a killed child end in one line
with nothing published.

The oracle is the compile that runs its checks one after another in its own process (the checks themselves are
tested against outside references elsewhere: tests/test_rules*.py, tests/test_optics*.py).
"""

import copy
import dataclasses
import hashlib
import json
import os
import signal

import pytest

import metalay.checks.steps as steps
import metalay.mask.compile as C
from metalay.api import compile_design, load_design
from metalay.errors import RulesError
from metalay.mask.checkrun import CHILD_FIXED_BYTES, concurrent_bytes, side_by_side
from metalay.mask.compile import compile_mask
from metalay.mask.steps import MaskCheck

from conftest import SMALL_DESIGN, write_toml


def _design(tmp_path, diameter_um=30.0):
    d = copy.deepcopy(SMALL_DESIGN)
    d["aperture"]["diameter_um"] = diameter_um
    d["mask"].update({"formats": ["gds"], "label": True})
    d["checks"] = {"rules": True, "optics": True}
    return write_toml(tmp_path / "d.toml", d)


def _files(folder):
    return {p.relative_to(folder).as_posix(): p.read_bytes() for p in sorted(folder.rglob("*"))
            if p.is_file() and p.name != "timings.json"}


def _timings(folder):
    return json.loads((folder / "timings.json").read_text())


@pytest.fixture
def stream_everything(monkeypatch):
    # the standard checks stream above STREAM_CHECKS_ABOVE_SITES (4e6 sites) when their streamed figure is the
    # smaller: lower the threshold and the fixed part so that a small mask takes the route of a wafer-scale one
    monkeypatch.setattr(steps, "STREAM_CHECKS_ABOVE_SITES", 0)
    monkeypatch.setattr(steps, "STREAMED_FIXED_BYTES", 0)


def test_side_by_side_checks_give_the_same_files_as_in_turn(tmp_path, stream_everything, monkeypatch):
    # Common practice (no source): a check is a pure function of the written file and the design, so where it runs
    # must not change a byte of what the compile publishes
    path = _design(tmp_path)
    together = compile_design(load_design(path), tmp_path / "together", show_progress=False)
    monkeypatch.setattr(C, "side_by_side", lambda *a, **k: False)
    in_turn = compile_design(load_design(path), tmp_path / "in-turn", show_progress=False)
    expected = "side by side" if (os.cpu_count() or 1) >= 2 else "in turn"
    assert _timings(tmp_path / "together")["checks_run"] == expected
    assert _timings(tmp_path / "in-turn")["checks_run"] == "in turn"
    # both checks streamed, both ran and passed, and every published file is identical (manifest, mask, optics/)
    for res in (together, in_turn):
        assert res.manifest["checks"]["rules"]["method"]["method"] != "whole-mask"
        assert res.manifest["checks"]["optics"]["method"]["method"] != "whole-mask"
        assert res.manifest["checks"]["rules"]["violations"] == 0
    assert _files(tmp_path / "together") == _files(tmp_path / "in-turn")
    # the digest each check reports (the compile's, computed while writing) is that of the published file
    digest = hashlib.sha256((tmp_path / "together" / together.files["gds"].name).read_bytes()).hexdigest()
    assert together.manifest["checks"]["rules"]["sha256"] == digest
    optics = json.loads((tmp_path / "together" / "optics" / "optics.json").read_text())
    assert optics["inputs"]["mask"]["sha256"] == digest


def test_side_by_side_needs_room_for_all_checks_at_once():
    # Common practice (no source): checks that run at once hold their memory at once; the decision adds their
    # streamed figures (and a fresh interpreter per child) and refuses when the sum does not fit
    rules, optics = steps.default_checks(rules=True, optics=True)
    both = frozenset({"rules", "optics"})
    n = 1e7
    need = concurrent_bytes((rules, optics), n)
    assert need == pytest.approx(2 * (steps.STREAMED_BYTES_PER_SITE * n + steps.STREAMED_FIXED_BYTES)
                                 + CHILD_FIXED_BYTES)
    two_cores = (os.cpu_count() or 1) >= 2
    assert side_by_side((rules, optics), both, n, need) is two_cores
    assert side_by_side((rules, optics), both, n, need - 1) is False
    assert side_by_side((rules, optics), frozenset({"rules"}), n, 1e15) is False  # one whole-mask check: in turn
    assert side_by_side((rules,), frozenset({"rules"}), n, 1e15) is False
    # a step a fresh interpreter cannot import (a lambda, a closure) runs in the compile's own process
    assert side_by_side((rules, dataclasses.replace(optics, run=lambda written: {})), both, n, 1e15) is False


def _passes(written):
    return {"status": "clean", "verdict": "pass", "verdict_items": [], "verdict_summary": "nothing to check"}


def _fails_with_bad_input(written):
    raise RulesError(f"{written.path.name}: injected rules error in a child process")


def _dies(written):
    os.kill(os.getpid(), signal.SIGKILL)


def _step(name, run):
    return MaskCheck(name, run, bytes_per_site=1000.0, streamed_bytes_per_site=1.0, streamed_fixed_bytes=0.0,
                     stream_above_sites=0.0)


@pytest.mark.skipif((os.cpu_count() or 1) < 2, reason="side by side needs a second processor")
@pytest.mark.parametrize("second, error, match", [
    (_fails_with_bad_input, RulesError, "injected rules error in a child process"),
    (_dies, RuntimeError, "the second check's process stopped before it finished"),
])
def test_an_error_in_a_child_check_stops_the_compile_and_publishes_nothing(tmp_path, second, error, match):
    path = _design(tmp_path, diameter_um=10.0)
    with pytest.raises(error, match=match) as info:
        compile_mask(load_design(path), tmp_path / "out", checks=(_step("first", _passes), _step("second", second)),
                     show_progress=False)
    assert "\n" not in str(info.value)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["d.toml"]  # no output, no stage, no lock


def test_checks_run_as_tasks_on_the_compile_cluster(tmp_path, stream_everything):
    # Common practice (no source): the cluster route gives the files of the single-process compile
    from distributed import LocalCluster

    path = _design(tmp_path)
    one = compile_design(load_design(path), tmp_path / "one", show_progress=False, sites_per_tile=1_500)
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=False, dashboard_address=None) as cluster:
        compile_design(load_design(path), tmp_path / "two", show_progress=False, sites_per_tile=1_500,
                       scheduler=cluster.scheduler_address)
    assert _timings(tmp_path / "two")["checks_run"] == "cluster"
    assert one.manifest["checks"]["optics"]["method"]["method"] != "whole-mask"
    assert _files(tmp_path / "one") == _files(tmp_path / "two")
