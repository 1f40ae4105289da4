"""The compile report (report.html) as a reader sees it: rendered in headless Chromium (the system package).

The page must load, every image must decode (naturalWidth > 0), the console must stay free of errors, and the
screenshot is kept as a test artefact (pytest's tmp path and out/test-artefacts/, which git ignores). A missing
Chromium FAILS the test with one line saying to install the system package ``chromium``.
"""

from __future__ import annotations

import json
import re
import shutil
from pathlib import Path

import numpy as np
import pytest

from browser import MISSING_CHROMIUM, find_chromium, inspect_page
from metalay.api import compile_design

from conftest import SMALL_DESIGN, write_toml

ROOT = Path(__file__).resolve().parent.parent
ARTEFACTS = ROOT / "out" / "test-artefacts"


def _compile(tmp_path, name, **changes):
    from metalay.api import load_design

    d = json.loads(json.dumps(SMALL_DESIGN))
    d["design"]["name"] = name
    d["checks"] = {"rules": True, "optics": True}
    for key, value in changes.items():
        table, k = key.split(".", 1)
        d.setdefault(table, {})[k] = value
    path = tmp_path / f"{name}.toml"
    write_toml(path, d)
    return compile_design(load_design(path), tmp_path / name, show_progress=False)


@pytest.fixture(scope="module")
def small_report(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("report")
    return _compile(tmp, "t-report")


def test_report_renders_in_chromium(small_report, tmp_path):
    if find_chromium() is None:
        pytest.fail(MISSING_CHROMIUM)
    html_path = small_report.files["report"]
    shot = tmp_path / "report.png"
    info = inspect_page(html_path, shot)
    assert info["ready"] == "complete"
    assert info["console_errors"] == [], info["console_errors"]
    assert len(info["images"]) >= 6  # overview, layout zoom, phase error map + histogram, rotations, far field
    for img in info["images"]:
        assert img["complete"] and img["w"] > 0 and img["h"] > 0, img
    text = info["text"]
    assert "Caution." in text and "full-wave simulation" in text
    for heading in ("Verdicts", "Design rules", "Whole mask", "Layout zoom", "Phase error", "Rotation angles",
                    "Far field on the designed spots"):
        assert heading in text, heading
    png = shot.read_bytes()
    assert png[:8] == b"\x89PNG\r\n\x1a\n" and len(png) > 20_000
    ARTEFACTS.mkdir(parents=True, exist_ok=True)
    shutil.copyfile(shot, ARTEFACTS / "compile-report.png")
    shutil.copyfile(html_path, ARTEFACTS / "compile-report.html")


def test_ci_installs_chromium_and_gitignore_keeps_artefacts_out():
    ci = (ROOT / ".ci" / "run").read_text()
    assert "command -v chromium" in ci and "apt-get install -y -q chromium" in ci
    assert (ROOT / ".gitignore").read_text().splitlines().count("out/*") == 1


def test_headline_table_matches_the_manifest(small_report):
    html = small_report.files["report"].read_text()
    m = small_report.manifest
    assert "<script" not in html and "http://" not in html and "https://" not in html  # offline, no scripts
    rows = [i for b in m["verdicts"]["by_check"].values() for i in b["items"]]
    for item in rows:
        assert re.search(rf"<td>{re.escape(item['what'])}</td>", html), item["what"]
    overall = m["verdicts"]["overall"]
    assert f'<td class="v-{overall}">{overall.upper()}</td>' in html
    assert m["caution"].split(": ", 1)[1][:60] in html  # the full caution, not a short line
    # numbers rounded for reading (4 significant digits), full precision stays in the manifest
    conv = m["checks"]["optics"]["figures"]["power_budget"]["converted"]
    assert f"{conv:.4f}" in html and repr(conv) not in html


def test_report_is_deterministic(small_report, tmp_path):
    again = _compile(tmp_path, "t-report")
    assert again.files["report"].read_bytes() == small_report.files["report"].read_bytes()


def test_rule_margins_against_the_cell_dimensions(small_report):
    """Margins measured on the written fins equal the fin's drawn size minus the limit.

    Source: the library cell (270 x 70 nm fin, libraries/tio2-nanofin-532.library.json) against the library's
    rules (minimum width 60 nm): a rectangle's width is its short side, so the margin is 70 - 60 = 10 nm, less up to
    1.5 nm of snapping of rotated vertices to the 1 nm grid (From memory: gdstk rounds half-to-even, style of
    mask/layout.py).
    """
    html = small_report.files["report"].read_text()
    row = re.search(r"<td>width</td><td class=\"num\">60</td>.*?</tr>", html, re.S).group(0)
    nums = re.findall(r'<td class="num">([-0-9.,]+)</td>', row)
    measured, margin = float(nums[3]), float(nums[4])
    assert 68.0 <= measured <= 70.5
    assert margin == pytest.approx(measured - 60.0, abs=0.01)


def test_violations_are_shown_where_they_are(tmp_path):
    """A negative bias makes the 70 nm fins 50 nm wide: width violations (limit 60 nm) fail the rules verdict, the
    report says so and draws them on the mask overview."""
    res = _compile(tmp_path, "t-thin", **{"mask.bias_nm": -10.0})
    m = res.manifest
    width = [r for r in m["checks"]["rules"]["results"] if r["rule"] == "width"][0]
    assert width["count"] > 0 and width["worst_value"] < 60.0
    html = res.files["report"].read_text()
    assert "where the violations are" in html
    assert m["verdicts"]["by_check"]["rules"]["verdict"] == "fail"
    assert '<td class="v-fail">FAIL</td>' in html


def test_zoom_lands_on_structures_of_an_annulus():
    """On an annulus the axis has no structures: the zoom window moves onto the nearest ones."""
    from metalay.checks.optics import _zoom_on_structures

    t = np.linspace(0, 2 * np.pi, 400, endpoint=False)
    ring = np.column_stack([np.concatenate([r * np.cos(t) for r in (20, 21, 22)]),
                            np.concatenate([r * np.sin(t) for r in (20, 21, 22)])])
    c = _zoom_on_structures(ring, (0.0, 0.0), 1.5)
    inside = np.maximum(np.abs(ring[:, 0] - c[0]), np.abs(ring[:, 1] - c[1])) < 1.5
    assert inside.sum() >= 4
    # a window that already holds structures stays where it is
    assert _zoom_on_structures(ring, (21.0, 0.0), 1.5) == (21.0, 0.0)


def test_label_offsets_point_away_from_the_spots():
    """Channel labels start outside their spot, on the side away from the other channels."""
    from metalay.checks.plots import _label_offsets

    pts = [(0.05, 0.0), (0.0, 0.05), (-0.05, 0.0), (0.0, -0.05)]
    for (x, y), (ox, oy) in zip(pts, _label_offsets(pts, (0.0, 0.0))):
        assert ox * x + oy * y > 0  # outward: flipping the direction would put labels over the other spots
