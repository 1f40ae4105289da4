"""The command line in a shell: --json gives one parseable object on stdout and nothing else, messages and warnings
go to stderr, one short caution line per command, --quiet/--verbose, exit codes; cells import --template; the
tolerance study refuses up front what it cannot evaluate; the SLM route's beam scaling; readable results."""

from __future__ import annotations

import json
import subprocess
import sys
import time
from dataclasses import replace
from pathlib import Path

import pytest

from metalay.cli._output import SHORT_CAUTION

from conftest import SMALL_DESIGN, write_toml

ROOT = Path(__file__).resolve().parent.parent


def _run(*argv, cwd=None):
    return subprocess.run([sys.executable, "-m", "metalay.cli", *map(str, argv)], capture_output=True, text=True,
                          cwd=cwd or ROOT)


def _design(tmp_path, name="t-cli", **changes):
    d = json.loads(json.dumps(SMALL_DESIGN))
    d["design"]["name"] = name
    for key, value in changes.items():
        if "." not in key:
            d[key] = value
            continue
        table, k = key.split(".", 1)
        d.setdefault(table, {})[k] = value
    path = tmp_path / f"{name}.toml"
    write_toml(path, d)
    return path


@pytest.fixture(scope="module")
def compiled(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("cli")
    path = _design(tmp, **{"checks.rules": True, "checks.optics": True})
    proc = _run("compile", path, "-o", tmp / "out", "--json")
    return tmp, path, proc


def test_compile_json_is_the_only_stdout(compiled):
    tmp, _, proc = compiled
    assert proc.returncode == 0, proc.stderr
    result = json.loads(proc.stdout)  # the whole of stdout is one JSON object
    assert result["command"] == "compile" and result["exit_code"] == 0
    assert result["verdicts"]["overall"] in ("pass", "warn")
    assert "design aid" in result["caution"] and "hydrofluoric" in result["caution"]  # the full caution
    assert Path(result["files"]["report"]).is_file() and Path(result["files"]["gds"]).is_file()
    assert proc.stderr.count(SHORT_CAUTION) == 1  # the short line, once, on stderr


def test_every_command_has_json_quiet_and_verbose():
    from metalay.cli import _build_parser, _load_modules

    parser = _build_parser(_load_modules())
    leaves = []

    def walk(p, name):
        subs = [a for a in p._actions if a.__class__.__name__ == "_SubParsersAction"]
        if not subs:
            leaves.append((name, p))
        for a in subs:
            for key, child in a.choices.items():
                walk(child, f"{name} {key}".strip())
    walk(parser, "")
    assert len(leaves) >= 20
    for name, p in leaves:
        for opt in ("--json", "--quiet", "--verbose"):
            assert opt in p._option_string_actions, f"{name} lacks {opt}"


def test_json_on_error_is_still_one_object_and_exit_code_2(tmp_path):
    bad = _design(tmp_path, "t-bad", **{"aperture.diameter_um": -5.0})
    proc = _run("compile", bad, "-o", tmp_path / "o", "--json")
    assert proc.returncode == 2
    result = json.loads(proc.stdout)
    assert result["exit_code"] == 2 and "aperture.diameter_um" in result["error"]
    assert "metalay: error:" in proc.stderr and "aperture.diameter_um" in proc.stderr


def test_rules_and_info_json(compiled, tmp_path):
    tmp, _, proc = compiled
    gds = json.loads(proc.stdout)["files"]["gds"]
    r = _run("rules", "check", gds, "--rules", "tio2-ebl-example", "-o", tmp_path / "r", "--json")
    assert r.returncode == 0, r.stderr
    data = json.loads(r.stdout)
    assert data["command"] == "rules check" and data["clean"] is True and data["total_violations"] == 0
    i = _run("info", gds, "--json")
    assert i.returncode == 0 and json.loads(i.stdout)["polygons"] > 0


def test_rules_text_table_has_units(compiled, tmp_path):
    tmp, _, proc = compiled
    gds = json.loads(proc.stdout)["files"]["gds"]
    r = _run("rules", "check", gds, "--rules", "tio2-ebl-example", "-o", tmp_path / "r")
    head = [line for line in r.stdout.splitlines() if line.startswith("layer")][0]
    assert head.split()[:4] == ["layer", "rule", "limit", "unit"]
    assert any(line.split()[3] == "nm" for line in r.stdout.splitlines() if line.startswith("1/0"))
    assert "clean: no design-rule violations" in r.stdout and SHORT_CAUTION not in r.stdout


def test_warnings_go_to_stderr(tmp_path):
    # a period above lambda/n in the substrate: a design warning (not an error)
    path = _design(tmp_path, "t-warn", **{"lattice.period_nm": 400.0})
    proc = _run("compile", path, "-o", tmp_path / "o", "--fail-at", "never")
    assert proc.returncode == 0, proc.stderr
    assert "metalay: warning:" in proc.stderr and "warning:" not in proc.stdout
    assert "verdict:" in proc.stdout


def test_quiet_prints_nothing_and_verbose_adds_notes(compiled, tmp_path):
    _, path, _ = compiled
    q = _run("compile", path, "-o", tmp_path / "q", "--quiet")
    assert q.returncode == 0 and q.stdout == "" and q.stderr == ""
    v = _run("compile", path, "-o", tmp_path / "v", "--verbose")
    assert "note (optics):" in v.stderr and "time " in v.stderr


def test_optics_exits_1_when_its_verdict_fails(compiled, tmp_path):
    """The mask holds charge 3; checked against a charge -3 design the OAM purity collapses: verdict fail."""
    tmp, path, proc = compiled
    gds = json.loads(proc.stdout)["files"]["gds"]
    wrong = _design(tmp_path, "t-cli", **{"phase": [{"kind": "vortex", "charge": -3}, {"kind": "tilt",
                                                                                      "angle_deg": 4.0}]})
    r = _run("optics", gds, "--design", wrong, "-o", tmp_path / "opt", "--json")
    result = json.loads(r.stdout)
    assert result["figures"]["verdicts"]["verdict"] == "fail"
    assert r.returncode == 1 and result["exit_code"] == 1
    never = _run("optics", gds, "--design", wrong, "-o", tmp_path / "opt2", "--fail-at", "never", "--quiet")
    assert never.returncode == 0
    right = _run("optics", gds, "--design", path, "-o", tmp_path / "opt3", "--quiet")
    assert right.returncode == 0


def test_cells_import_template_imports_after_filling_responses(tmp_path):
    t = _run("cells", "import", "--template", tmp_path / "tpl")
    assert t.returncode == 0, t.stderr
    meta, csv = tmp_path / "tpl" / "meta.toml", tmp_path / "tpl" / "responses.csv"
    assert "responses.csv" in meta.read_text()  # the metadata names the responses file to fill
    with csv.open("a") as fh:  # responses of the template's one cell (invented numbers, passive: |t|^2 <= 1)
        fh.write("fin-270x70,520,0.6,0.5,-0.6,0.4,0.95,0.95\nfin-270x70,540,0.6,0.45,-0.62,0.4,0.95,0.95\n")
    r = _run("cells", "import", csv, "--meta", meta, "-o", tmp_path / "lib", "--json")
    assert r.returncode == 0, r.stderr
    files = json.loads(r.stdout)["files"]
    from metalay.cells.library import load_library

    lib = load_library([f for f in files if f.endswith(".library.json")][0])
    assert lib.name == "my-imported-fins" and lib.has_responses and lib.cells[0].dim("width_nm") == 70.0
    again = _run("cells", "import", "--template", tmp_path / "tpl")
    assert again.returncode == 2 and "already exists" in again.stderr


def test_format_md_documents_the_template():
    text = (ROOT / "libraries" / "FORMAT.md").read_text()
    assert "metalay cells import --template" in text and "meta.toml" in text


def test_tolerance_refuses_cd_bias_up_front(tmp_path):
    """A library imported from elsewhere with one fin size and no recorded solver truncation: CD bias can neither be
    interpolated between sizes nor re-solved. The refusal comes before the compile (no output folder is made) and
    names the option and why, in one line."""
    from metalay.cells.cellbuild import import_responses, import_template
    from metalay.cells.library import save_library

    meta, csv = import_template(tmp_path / "tpl")
    with csv.open("a") as fh:  # invented passive responses of the template's one cell
        fh.write("fin-270x70,520,0.6,0.5,-0.6,0.4,0.95,0.95\nfin-270x70,540,0.6,0.45,-0.62,0.4,0.95,0.95\n")
    lib_json = [p for p in save_library(import_responses(csv, meta), tmp_path / "lib")
                if p.name.endswith(".library.json")][0]
    path = _design(tmp_path, "t-tol", **{"design.library": str(lib_json)})
    t0 = time.perf_counter()
    proc = _run("tolerance", path, "--cd-bias-nm", "0", "2", "--samples", "4", "-o", tmp_path / "tol")
    assert time.perf_counter() - t0 < 60
    assert proc.returncode == 2, proc.stderr
    err = [line for line in proc.stderr.splitlines() if line.strip()]
    assert len(err) == 1 and err[0].startswith("metalay: error:")
    assert "cd_bias" in err[0] and "--cd-bias-nm" in err[0] and "truncation" in err[0]
    assert not (tmp_path / "tol").exists()
    ok = _run("tolerance", path, "--cd-bias-nm", "0", "2", "--cd-response", "nominal", "--samples", "2",
              "--no-plots", "-o", tmp_path / "tol2", "--json")
    assert ok.returncode == 0, ok.stderr
    assert any("CD bias not evaluated" in n for n in json.loads(ok.stdout)["notes"])


def test_slm_beam_scaling_raises_efficiency_on_a_15_mm_panel(tmp_path):
    """A 300 um beam on a 1920 x 1080 panel of 8 um pixels (15.4 mm wide) spans 38 pixels: a 4 deg tilt at 532 nm
    (period 7.6 um) is aliased. Spread over the panel's height (1080 pixels) the same phase is sampled at 29 pixels
    per carrier period, and an 8-bit phase SLM reaches sinc^2(1/256) ~ 1 (Swanson 1989, MIT Lincoln Laboratory
    TR 854)."""
    from metalay.cli import demo_design_path
    from metalay.design.spec import load_design
    from metalay.routes import routes as R

    design = load_design(demo_design_path())
    st = R.parse_routes(design)
    small = R.compare_routes(design, st, routes=("slm",), samples=256)[0]
    scaled = replace(st, slm=replace(st.slm, beam_diameter_px=1080.0))
    big = R.compare_routes(design, scaled, routes=("slm",), samples=256)[0]
    assert small.efficiency < 0.05
    assert big.efficiency > 0.9 and big.efficiency > 20 * small.efficiency
    assert R.slm_image(design, scaled).magnification == pytest.approx(1080 * 8.0 / 300.0)
    # the beam scaled too far: cropped, and said so
    over = replace(st, slm=replace(st.slm, magnification=100.0))
    assert any("smaller than the beam" in w for w in R.slm_image(design, over).warnings)


def test_compile_result_prints_readably(tmp_path):
    from metalay.api import compile_design, load_design

    res = compile_design(load_design(_design(tmp_path, "t-str")), tmp_path / "o", show_progress=False)
    text = str(res)
    assert text.startswith("compile of t-str into") and "verdict: PASS" in text and "  gds: t-str.gds" in text
    assert repr(res).startswith("CompileResult(out_dir=") and len(repr(res)) < 400 and "{" not in repr(res)
