"""The memory budget (one helper for the readers and the compile) and the compile's admission under a real
address-space limit (``ulimit -v``): refused up front in one line, never a MemoryError after writing.
"""

import copy
import json
import subprocess
import sys
from pathlib import Path

import pytest

from metalay.errors import MetalayError
from metalay.mask.compile import COMPILE_FIXED_BYTES, compile_memory_bytes
from metalay.util.budget import memory_budget, memory_limits, parse_memory_size

from conftest import SMALL_DESIGN, write_toml

ROOT = Path(__file__).resolve().parent.parent


@pytest.mark.parametrize("text, value", [("4G", 4 * 10 ** 9), ("4GB", 4 * 10 ** 9), ("4GiB", 4 << 30),
                                         ("512M", 512 * 10 ** 6), ("1.5g", 1_500_000_000), ("1e9", 10 ** 9),
                                         ("123", 123), ("64KiB", 65536)])
def test_sizes(text, value):
    # Source: IEC 80000-13 (binary prefixes Ki, Mi, Gi = 2^10, 2^20, 2^30; SI prefixes k, M, G = 10^3, 10^6, 10^9)
    assert parse_memory_size(text) == value


@pytest.mark.parametrize("text", ["", "lots", "-1G", "0", "4 XB", "G"])
def test_bad_sizes_name_the_allowed_forms(text):
    with pytest.raises(MetalayError, match="allowed: a positive size"):
        parse_memory_size(text)


_CHILD = r"""
import json, resource, sys
cap = int(sys.argv[1])
resource.setrlimit(resource.RLIMIT_AS, (cap, cap))
from metalay.util.budget import memory_budget, memory_limits
lim = memory_limits()
print(json.dumps({"as": lim.address_space_bytes, "binding": lim.binding, "budget": memory_budget(),
                  "explicit": memory_budget(12345)}))
"""


def test_address_space_limit_is_seen_and_binds():
    cap = 3 << 30
    out = subprocess.run([sys.executable, "-c", _CHILD, str(cap)], capture_output=True, text=True, check=True)
    got = json.loads(out.stdout)
    assert 0 < got["as"] < cap and got["binding"].startswith("address-space limit")
    assert got["budget"] == got["as"] // 2 and got["explicit"] == 12345
    here = memory_limits()
    assert here.least_bytes > 0 and memory_budget() <= here.least_bytes


def test_admission_estimate_is_the_largest_stage():
    n = 1e7
    plain = compile_memory_bytes(n)
    checked = compile_memory_bytes(n, check_bytes_per_site=300.0)
    # every output format is streamed tile by tile: the layout term does not depend on the format, and it stops
    # growing past 1e7 sites (bench/bench_scale.py: peak 239 MB at 1e7 sites, 275 MB at 1e8)
    assert plain["total"] == COMPILE_FIXED_BYTES + plain["layout"] == COMPILE_FIXED_BYTES + 30 * 10 ** 7
    assert compile_memory_bytes(1e9)["total"] == plain["total"]
    assert compile_memory_bytes(1e6)["total"] == COMPILE_FIXED_BYTES + 30 * 10 ** 6
    assert compile_memory_bytes(1e9, check_bytes_per_site=300.0)["total"] == COMPILE_FIXED_BYTES + 300 * 10 ** 9
    assert checked["total"] == COMPILE_FIXED_BYTES + 300 * 10 ** 7  # checks dominate: not added to the layout


_CAPPED = r"""
import resource, sys
cap = int(sys.argv[1])
resource.setrlimit(resource.RLIMIT_AS, (cap, cap))
from metalay.cli import main
sys.exit(main(sys.argv[2:]))
"""


def test_capped_compile_is_refused_up_front_or_runs_to_the_end(tmp_path):
    cap = 2 << 30  # ulimit -v 2097152
    big = copy.deepcopy(SMALL_DESIGN)
    big["aperture"]["diameter_um"] = 1500.0  # 1.7e7 sites: several GB with the checks
    big["checks"] = {"rules": True, "optics": True}
    small = copy.deepcopy(big)
    small["aperture"]["diameter_um"] = 30.0
    for name, data, code in (("big", big, 2), ("small", small, 0)):
        design = write_toml(tmp_path / f"{name}.toml", data)
        proc = subprocess.run([sys.executable, "-c", _CAPPED, str(cap), "compile", str(design), "-o",
                               str(tmp_path / name), "--quiet"], capture_output=True, text=True, timeout=600,
                              cwd=ROOT)
        assert proc.returncode == code, proc.stderr[-3000:]
        if code:
            err = proc.stderr.strip()
            assert "\n" not in err and "address-space limit" in err and "--no-checks" in err, err
            assert not (tmp_path / name).exists()
        else:
            assert (tmp_path / name / "manifest.json").is_file()


def _steps():
    from metalay.checks.steps import default_checks

    return default_checks(rules=True, optics=True)


def test_admission_counts_a_check_streamed_only_when_its_whole_mask_method_does_not_fit(small_design_dict):
    # Common practice (no source): admit with the method the step will use; constants measured in
    # bench/bench_admission.py (whole mask) and bench/bench_stream_checks.py (streamed), docs/scale-checks.md
    from metalay.checks.steps import RULES_BYTES_PER_SITE, STREAMED_BYTES_PER_SITE, STREAMED_FIXED_BYTES
    from metalay.design.spec import parse_design
    from metalay.mask.compile import check_admission_bytes_per_site

    design = parse_design(small_design_dict)
    room = 1_000_000_000
    budget = COMPILE_FIXED_BYTES + room
    fits = check_admission_bytes_per_site(_steps(), design, room / RULES_BYTES_PER_SITE * 0.99,
                                          max_memory_bytes=budget)
    assert fits == (RULES_BYTES_PER_SITE, frozenset())
    n = 1e8
    budget = COMPILE_FIXED_BYTES + 4 * room
    per_site, streamed = check_admission_bytes_per_site(_steps(), design, n, max_memory_bytes=budget)
    assert streamed == {"rules", "optics"}
    assert per_site == pytest.approx(STREAMED_BYTES_PER_SITE + STREAMED_FIXED_BYTES / n)
    # 1e8 sites now fit 4.5 GB (whole-mask checks: 30 GB)
    assert compile_memory_bytes(n, check_bytes_per_site=per_site)["total"] <= budget
    # a design the streamed optics does not cover keeps the whole-mask figure for that check
    inverse = parse_design({**small_design_dict, "mask": {"formats": ["gds"], "tone": "complement"}})
    per_site, streamed = check_admission_bytes_per_site(_steps(), inverse, n, max_memory_bytes=budget)
    assert streamed == {"rules"} and per_site > RULES_BYTES_PER_SITE / 2
    # above STREAM_CHECKS_ABOVE_SITES the checks stream even with room to spare (issue 15: 1e7 sites with checks in
    # <= 1.5 GB); at or below it they stay whole-mask
    from metalay.checks.steps import STREAM_CHECKS_ABOVE_SITES as above
    roomy = 1 << 50
    assert check_admission_bytes_per_site(_steps(), design, above * 1.01, max_memory_bytes=roomy)[1] == {"rules",
                                                                                                      "optics"}
    assert check_admission_bytes_per_site(_steps(), design, above, max_memory_bytes=roomy)[1] == set()
    # a small mask: the fixed part of streaming costs more than the whole mask, so the whole mask is counted
    assert check_admission_bytes_per_site(_steps(), design, 1e5, max_memory_bytes=COMPILE_FIXED_BYTES + 1)[1] == set()


def test_compile_streams_its_checks_when_the_admission_says_so(tmp_path, small_design_dict):
    # 1.2e6 sites: the whole-mask rules check (300 B/site, 360 MB) does not fit beside the compile's fixed part in a
    # budget of 800 MB, its streamed method (30 B/site + 300 MB) does; the whole-mask optics check (220 B/site,
    # 264 MB) fits and is kept; before, this compile was refused up front
    from metalay.api import compile_design
    from metalay.design.spec import parse_design

    raw = small_design_dict
    raw["aperture"]["diameter_um"] = 402.0
    raw["mask"]["formats"] = ["gds"]
    raw["checks"] = {"rules": True, "optics": True}
    res = compile_design(parse_design(raw), tmp_path / "c", show_progress=False, max_memory_bytes=800_000_000)
    checks = res.manifest["checks"]
    assert checks["rules"]["method"]["method"] != "whole-mask" and checks["rules"]["violations"] == 0
    assert checks["optics"]["method"]["method"] == "whole-mask"
    assert checks["optics"]["figures"]["designed_spot_efficiency"] > 0.5
