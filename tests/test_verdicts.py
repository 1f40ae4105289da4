"""Verdicts, not "ok": every check is judged pass / warn / fail against thresholds with units, and the summary,
the manifest and the exit code follow."""

import copy
import json

import numpy as np
import pytest

from metalay.checks import fringes, optics
from metalay.cli import main
from metalay.design.limits import DEFAULT_LIMITS, Limits, judge, verdict_at_least, worst_verdict
from metalay.design.spec import load_design
from metalay.errors import DesignError

from conftest import SMALL_DESIGN, write_toml


def _small(tmp_path, name, **changes):
    d = copy.deepcopy(SMALL_DESIGN)
    d["design"]["name"] = name
    d["checks"] = {"rules": True, "optics": True}
    for key, value in changes.items():
        d[key] = value
    return write_toml(tmp_path / f"{name}.toml", d)


def test_thresholds_are_compared_the_right_way_round():
    # Common practice (no source): a figure where higher is better fails below its fail threshold and warns below
    # its warn threshold; a figure where lower is better the other way round; a value exactly at a threshold has
    # not crossed it. Inverting any comparison changes one of these verdicts.
    lim = Limits()
    purity = lim.get("oam_purity")  # warn below 0.9, fail below 0.7
    assert [judge(v, purity)["verdict"] for v in (0.95, 0.9, 0.85, 0.7, 0.69)] == [
        "pass", "pass", "warn", "warn", "fail"]
    snap = lim.get("snapping_phase_error_deg")  # warn above 1 deg, fail above 5 deg
    assert [judge(v, snap)["verdict"] for v in (0.5, 1.0, 2.0, 5.0, 6.0)] == ["pass", "pass", "warn", "warn", "fail"]
    rules = lim.get("rule_violations")
    assert judge(0, rules)["verdict"] == "pass" and judge(1, rules)["verdict"] == "fail"
    assert judge(None, purity)["verdict"] == "warn" and judge(float("nan"), snap)["verdict"] == "warn"
    assert "0.405 < 0.7 (fail)" in judge(0.405, purity)["text"]
    assert worst_verdict(["pass", "fail", "warn"]) == "fail" and worst_verdict([]) is None
    assert verdict_at_least("warn", "warn") and not verdict_at_least("warn", "fail")
    assert not verdict_at_least("fail", "never")
    for lim_ in DEFAULT_LIMITS:  # the defaults are ordered consistently
        assert (lim_.fail <= lim_.warn) if lim_.higher_is_better else (lim_.fail >= lim_.warn), lim_.key


def test_two_level_design_fails_and_exits_one(tmp_path, capsys):
    # Source: Swanson 1989, MIT Lincoln Laboratory TR 854: K phase levels put sinc^2(1/K) of the converted power
    # into the designed order, 0.405 for K = 2, so a 2-level vortex has purity ~0.41 and must not pass.
    d = copy.deepcopy(SMALL_DESIGN)
    d["mask"]["rotation_levels"] = 2
    path = _small(tmp_path, "two-level", mask=d["mask"])
    assert main(["compile", str(path), "-o", str(tmp_path / "o"), "--quiet"]) == 1
    err = capsys.readouterr().err
    assert "verdict fail" in err and "oam_purity" in err
    man = json.loads((tmp_path / "o" / "manifest.json").read_text())
    v = man["verdicts"]
    assert v["overall"] == "fail" and v["by_check"]["optics"]["verdict"] == "fail"
    assert v["by_check"]["writing"]["verdict"] == "fail"  # quantisation error 90 deg > 50 deg
    purity = man["checks"]["optics"]["figures"]["oam"]["purity"]
    assert purity == pytest.approx(np.sinc(0.5) ** 2, abs=0.05)
    assert man["checks"]["optics"]["status"] == "fail"
    # the files are written (the verdict is the user's to act on) and --fail-at never exits 0
    assert main(["compile", str(path), "-o", str(tmp_path / "o2"), "--quiet", "--fail-at", "never"]) == 0


def test_bad_demultiplexer_does_not_pass_and_good_design_passes(tmp_path, capsys):
    # A square channel layout (carriers at 0/90/180/270 deg) has mixing products on the channels (a fifth-order
    # product of matching charge lands exactly on two of them: metalay.measure.demux), which caps the isolation
    # below the 20 dB default; the default vortex-and-tilt design passes every threshold.
    chans = [{"charge": q, "angle_deg": 6.0, "azimuth_deg": az} for q, az in ((-2, 0), (-1, 90), (1, 180), (2, 270))]
    ap = {"shape": "circle", "diameter_um": 40.0}
    bad = _small(tmp_path, "square-demux", phase=[{"kind": "multiplex", "channels": chans}], aperture=ap)
    assert main(["compile", str(bad), "-o", str(tmp_path / "bad"), "--quiet"]) == 0  # warn: exit 0 by default
    man = json.loads((tmp_path / "bad" / "manifest.json").read_text())
    assert man["verdicts"]["overall"] in ("warn", "fail")
    assert man["checks"]["optics"]["figures"]["crosstalk"]["worst_isolation_db"] < 20.0
    assert main(["compile", str(bad), "-o", str(tmp_path / "bad2"), "--quiet", "--fail-at", "warn"]) == 1
    good = _small(tmp_path, "good")
    assert main(["compile", str(good), "-o", str(tmp_path / "good"), "--fail-at", "warn"]) == 0
    out = capsys.readouterr().out
    assert "verdict: PASS" in out and "optics check: PASS" in out and "rules check: PASS" in out
    man = json.loads((tmp_path / "good" / "manifest.json").read_text())
    assert man["verdicts"]["overall"] == "pass"
    assert all(b["verdict"] == "pass" for b in man["verdicts"]["by_check"].values())


def test_design_limits_override_and_are_validated(tmp_path):
    # a stricter purity limit turns the good design's verdict; badly ordered limits are one clear error
    strict = _small(tmp_path, "strict", checks={"rules": False, "optics": True, "fail_at": "warn",
                                                 "limits": {"oam_purity": {"warn_below": 0.99999, "fail_below": 0.5},
                                                            "converted_efficiency": {"fail_below": 0.2}}})
    design = load_design(strict)
    assert design.checks.limits.get("oam_purity").warn == 0.99999
    assert design.checks.limits.get("converted_efficiency").warn == 0.5  # the other threshold keeps its default
    assert main(["compile", str(strict), "-o", str(tmp_path / "s"), "--quiet"]) == 1
    man = json.loads((tmp_path / "s" / "manifest.json").read_text())
    assert man["verdicts"]["by_check"]["optics"]["verdict"] == "warn"
    assert man["verdicts"]["limits"]["oam_purity"]["warn_below"] == 0.99999
    bad = _small(tmp_path, "badlim", checks={"limits": {"strehl": {"warn_below": 0.5, "fail_below": 0.8}}})
    with pytest.raises(DesignError, match=r"checks\.limits\.strehl\.fail_below.*<= warn_below"):
        load_design(bad)
    typo = _small(tmp_path, "typo", checks={"limits": {"purity": {"warn_below": 0.5}}})
    with pytest.raises(DesignError, match=r"unknown key 'checks\.limits\.purity'"):
        load_design(typo)
    with pytest.raises(DesignError, match=r"checks\.fail_at"):
        load_design(_small(tmp_path, "badlevel", checks={"fail_at": "sometimes"}))


def test_fringe_reading_whose_loops_disagree_is_unreadable():
    # A reading is a number only when every loop around the core gives the same whole winding (Takeda et al.
    # 1982, J. Opt. Soc. Am. 72, 156: the demodulated phase's winding around the core is the charge).
    good = fringes.ChargeReading(3, np.array([2.98, 3.01, 3.0, 2.97]), np.ones(4), 0, 0, (1, 0), 1.0)
    split = fringes.ChargeReading(3, np.array([3.0, 3.0, 2.0, 3.0]), np.ones(4), 0, 0, (1, 0), 0.75)
    fuzzy = fringes.ChargeReading(3, np.array([3.0, 3.4, 3.0, 3.0]), np.ones(4), 0, 0, (1, 0), 1.0)
    assert good.status == "read" and split.status == "unreadable" and fuzzy.status == "unreadable"
    figures = {"power_budget": {"converted": 0.97},
               "fringe_reading": {"status": "unreadable", "charge": None, "design_charge": 3}}
    v = optics.optics_verdicts(figures)
    assert v["verdict"] == "warn" and "unreadable" in v["summary"]
    figures["fringe_reading"] = {"status": "read", "charge": 2, "design_charge": 3}
    assert optics.optics_verdicts(figures)["verdict"] == "fail"
    figures["fringe_reading"] = {"status": "read", "charge": 3, "design_charge": 3}
    assert optics.optics_verdicts(figures)["verdict"] == "pass"


def test_write_field_edges_are_judged(tmp_path):
    # Elements that stay across a field boundary (stitching splits them) or are left out are judged per site:
    # fields of 5 um from (0.1, 0.1) um cut through rows of cells, and a 1 nm shift budget moves almost none.
    from metalay.api import compile_design

    verdicts = {}
    for mode in ("shift", "shift-or-drop"):
        d = copy.deepcopy(SMALL_DESIGN)
        d["design"]["name"] = f"wf-{mode}"
        d["mask"]["write_field"] = {"size_um": 5.0, "origin_um": [0.1, 0.1], "straddle": mode, "max_shift_nm": 1.0}
        res = compile_design(load_design(write_toml(tmp_path / f"{mode}.toml", d)), tmp_path / mode,
                             show_progress=False)
        items = {i["key"]: i for i in res.manifest["verdicts"]["by_check"]["writing"]["items"]}
        counts = res.manifest["process"]["write_field"]["counts"]
        verdicts[mode] = items
        assert items["straddling_fraction"]["count"] == counts["kept_straddling"]
        assert items["dropped_fraction"]["count"] == counts["dropped"]
    assert verdicts["shift"]["straddling_fraction"]["verdict"] == "fail"
    assert verdicts["shift"]["dropped_fraction"]["verdict"] == "pass"
    assert verdicts["shift-or-drop"]["dropped_fraction"]["verdict"] == "fail"
    assert verdicts["shift-or-drop"]["straddling_fraction"]["verdict"] == "pass"
