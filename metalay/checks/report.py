"""Single-page HTML reports: sections of tables, figures and text, numbers grouped with units, the caution first.

A report is a list of :class:`Section` objects (each a title and blocks: :class:`Table`, :class:`Figure`,
:class:`Text`) rendered by :func:`render_page`. A check adds what it knows as its own sections (the optical check:
phase error, rotation angles, far field on the designed spots; a second spin or another check adds its own), and
:func:`compile_report` puts them behind the compile's headline verdicts, the design-rule result and the whole-mask
overview. :func:`render_html` is the older entry (inputs and numbers as nested dicts), now drawn the same way.

The page is self-contained (images as base64 data URIs, styles inline), has no scripts, no dates and no external
references, so it opens offline and the same inputs give the same bytes. Numbers are shown with about four
significant digits and their unit; the JSON files keep full precision.
"""

from __future__ import annotations

import base64
import html
import json
import math
from dataclasses import dataclass, field

__all__ = ["Table", "Figure", "Text", "Section", "render_page", "render_html", "flatten_figures", "fmt_number",
           "unit_of_key", "dict_tables", "verdict_section", "compile_report"]

_STYLE = """
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;max-width:1150px;margin:24px auto;color:#1d2a33;
line-height:1.4;padding:0 16px}
h1{font-size:1.5em;border-bottom:2px solid #3b6e8f;padding-bottom:4px}h2{font-size:1.2em;color:#3b6e8f;
margin-top:1.6em;border-bottom:1px solid #c8d3da}h3{font-size:1em;margin:1em 0 .3em}
.caution{background:#fff4e0;border-left:5px solid #d9822b;padding:8px 12px;margin:12px 0}
table{border-collapse:collapse;font-size:.9em;margin:4px 0 10px}td,th{border:1px solid #c8d3da;padding:3px 8px;
text-align:left;vertical-align:top}th{background:#eef3f6}td.num{text-align:right;font-variant-numeric:tabular-nums}
.figs{display:flex;flex-wrap:wrap;gap:14px}.figs figure{margin:0;max-width:540px}
figcaption{font-size:.85em;color:#4b5b66}img{max-width:100%}code{font-size:.9em}
.v-pass{background:#e3f4e1;color:#1f5c1a;font-weight:bold}.v-warn{background:#fff0c8;color:#7a5200;font-weight:bold}
.v-fail{background:#fbdcdc;color:#8a1c1c;font-weight:bold}nav{font-size:.9em}nav a{margin-right:12px}
.tcap{font-size:.85em;color:#4b5b66;margin:0}
"""


# ------------------------------------------------------------------------------------------------------------------
# Blocks and sections
# ------------------------------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class Table:
    """A table: ``columns`` (header texts) and ``rows`` (tuples of cell texts, already formatted).

    A cell ``("pass"|"warn"|"fail")`` in a column named ``verdict`` is coloured; cells that look like numbers are
    right-aligned.
    """

    columns: tuple
    rows: tuple
    title: str = ""
    caption: str = ""


@dataclass(frozen=True)
class Figure:
    """A PNG figure with its caption (embedded as a data URI)."""

    caption: str
    png: bytes
    alt: str = ""


@dataclass(frozen=True)
class Text:
    """A paragraph (``items`` given: a bulleted list)."""

    text: str = ""
    items: tuple = ()


@dataclass(frozen=True)
class Section:
    """One section of a report: ``key`` (the HTML anchor), ``title``, blocks, and ``order`` (ascending)."""

    key: str
    title: str
    blocks: tuple = field(default_factory=tuple)
    order: int = 50


# ------------------------------------------------------------------------------------------------------------------
# Numbers and units
# ------------------------------------------------------------------------------------------------------------------

#: Unit shown for a key ending in one of these suffixes (the naming convention of metalay: units in names).
_UNIT_SUFFIXES = (("_nm", "nm"), ("_um", "um"), ("_mm", "mm"), ("_deg", "deg"), ("_db", "dB"), ("_rad", "rad"),
                  ("_um2", "um^2"), ("_bytes", "bytes"), ("_s", "s"), ("_pct", "%"), ("_per_um", "1/um"))


def unit_of_key(key: str) -> str:
    """The unit a dotted key names by its suffix (``"lobe_radius_u"`` -> ``""``, ``"fwhm_x_um"`` -> ``"um"``)."""
    last = str(key).rsplit(".", 1)[-1].lower()
    for suffix, unit in _UNIT_SUFFIXES:
        if last.endswith(suffix):
            return unit
    return ""


def fmt_number(v, digits: int = 4) -> str:
    """A number for a table: integers with thousands separators, floats with ``digits`` significant digits
    (fixed notation between 1e-3 and 1e6, else scientific); booleans and None in words."""
    if v is None:
        return "-"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, int):
        return f"{v:,}"
    if isinstance(v, float):
        if not math.isfinite(v):
            return str(v)
        if v == 0:
            return "0"
        a = abs(v)
        if 1e-3 <= a < 1e6:
            decimals = max(0, digits - 1 - int(math.floor(math.log10(a))))
            return f"{v:,.{decimals}f}"
        return f"{v:.{digits - 1}e}"
    return str(v)


def _cell_text(v) -> str:
    if isinstance(v, (list, tuple)):
        if len(v) <= 8 and all(isinstance(x, (int, float)) and not isinstance(x, bool) for x in v):
            return ", ".join(fmt_number(x) for x in v)
        text = json.dumps(v, sort_keys=True, default=str)
        return text if len(text) <= 120 else f"{len(v)} values (see the JSON file)"
    return fmt_number(v)


def dict_tables(d: dict, *, skip=()) -> list[Table]:
    """Nested dict of figures -> one table per top-level group (quantity, value, unit); scalars at the top level
    form a first table. Long lists are summarised (full values stay in the JSON)."""
    scalars, tables = [], []
    for key in sorted(d):
        if key in skip:
            continue
        val = d[key]
        if isinstance(val, dict):
            rows = tuple((k, _cell_text(x), unit_of_key(k)) for k, x in flatten_figures(val, raw=True))
            if rows:
                tables.append(Table(("quantity", "value", "unit"), rows, title=key.replace("_", " ")))
        else:
            scalars.append((key, _cell_text(val), unit_of_key(key)))
    if scalars:
        tables.insert(0, Table(("quantity", "value", "unit"), tuple(scalars), title="general"))
    return tables


def flatten_figures(d: dict, prefix: str = "", *, raw: bool = False) -> list[tuple[str, object]]:
    """Nested dict -> sorted (dotted key, value) rows; ``raw=False`` gives texts (6 significant digits)."""
    rows = []
    for key in sorted(d):
        val = d[key]
        name = f"{prefix}{key}"
        if isinstance(val, dict):
            rows.extend(flatten_figures(val, name + ".", raw=raw))
        elif raw:
            rows.append((name, val))
        elif isinstance(val, float):
            rows.append((name, f"{val:.6g}"))
        elif isinstance(val, (list, tuple)):
            text = json.dumps(val, sort_keys=True, default=float)
            rows.append((name, text if len(text) <= 160 else text[:157] + "..."))
        else:
            rows.append((name, str(val)))
    return rows


# ------------------------------------------------------------------------------------------------------------------
# Rendering
# ------------------------------------------------------------------------------------------------------------------

def _looks_numeric(text: str) -> bool:
    t = text.replace(",", "").replace(" ", "")
    try:
        float(t)
        return True
    except ValueError:
        return False


def _render_table(t: Table) -> list[str]:
    esc = html.escape
    out = []
    if t.title:
        out.append(f"<h3>{esc(t.title)}</h3>")
    out.append("<table><tr>" + "".join(f"<th>{esc(str(c))}</th>" for c in t.columns) + "</tr>")
    vcol = [k for k, c in enumerate(t.columns) if str(c).lower() == "verdict"]
    for row in t.rows:
        cells = []
        for k, c in enumerate(row):
            text = str(c)
            if k in vcol and text.lower() in ("pass", "warn", "fail"):
                cells.append(f'<td class="v-{text.lower()}">{esc(text.upper())}</td>')
            elif _looks_numeric(text):
                cells.append(f'<td class="num">{esc(text)}</td>')
            else:
                cells.append(f"<td>{esc(text)}</td>")
        out.append("<tr>" + "".join(cells) + "</tr>")
    out.append("</table>")
    if t.caption:
        out.append(f'<p class="tcap">{esc(t.caption)}</p>')
    return out


def _render_blocks(blocks) -> list[str]:
    esc = html.escape
    out, figs = [], []

    def flush():
        if figs:
            out.append('<div class="figs">')
            out.extend(figs)
            out.append("</div>")
            figs.clear()

    for b in blocks:
        if isinstance(b, Figure):
            data = base64.b64encode(b.png).decode("ascii")
            figs.append(f'<figure><img alt="{esc(b.alt or b.caption)}" src="data:image/png;base64,{data}">'
                        f"<figcaption>{esc(b.caption)}</figcaption></figure>")
            continue
        flush()
        if isinstance(b, Table):
            out.extend(_render_table(b))
        elif isinstance(b, Text):
            if b.text:
                out.append(f"<p>{esc(b.text)}</p>")
            if b.items:
                out.append("<ul>" + "".join(f"<li>{esc(str(i))}</li>" for i in b.items) + "</ul>")
    flush()
    return out


def render_page(*, title: str, caution: str, sections, subtitle: str = "") -> str:
    """Render sections (sorted by ``order``, then in the given order) as one HTML page.

    Parameters
    ----------
    title : str
        Page heading.
    caution : str
        The full safety caution, shown first.
    sections : sequence of Section
    subtitle : str
        One line under the heading (e.g. the overall verdict).

    Returns
    -------
    str
        The HTML text (UTF-8, LF line ends); the same input gives the same text.
    """
    esc = html.escape
    ordered = [s for _, _, s in sorted((s.order, k, s) for k, s in enumerate(sections))]
    out = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
           '<meta name="viewport" content="width=device-width, initial-scale=1">', f"<title>{esc(title)}</title>",
           f"<style>{_STYLE}</style></head><body>", f"<h1>{esc(title)}</h1>"]
    if subtitle:
        out.append(f"<p>{esc(subtitle)}</p>")
    text = caution[len("Caution:"):].strip() if caution.lower().startswith("caution:") else caution
    out.append(f'<div class="caution"><strong>Caution.</strong> {esc(text)}</div>')
    if len(ordered) > 2:
        out.append("<nav>" + "".join(f'<a href="#{esc(s.key)}">{esc(s.title)}</a>' for s in ordered) + "</nav>")
    for s in ordered:
        out.append(f'<section id="{esc(s.key)}"><h2>{esc(s.title)}</h2>')
        out.extend(_render_blocks(s.blocks))
        out.append("</section>")
    out.append("</body></html>")
    return "\n".join(out) + "\n"


def render_html(*, title: str, caution: str, inputs: dict, figures: dict, images: dict, notes=(),
                sections=()) -> str:
    """Render a check's report from nested dicts (inputs, figures), images and notes, plus extra sections.

    Parameters
    ----------
    title : str
        Page heading.
    caution : str
        Safety caution shown at the top.
    inputs : dict
        Input description (paths, SHA-256, settings); grouped into tables.
    figures : dict
        Numbers of the check (nested dicts allowed); one table per group, with units from the key names.
    images : dict name -> (caption, png bytes)
        Figures, embedded in name order.
    notes : sequence of str
        Modelling notes and approximations (stated in the report).
    sections : sequence of Section
        Further sections (e.g. :func:`metalay.checks.optics.report_sections`).

    Returns
    -------
    str
        The HTML text (UTF-8, LF line ends).
    """
    figs = tuple(Figure(cap, png, alt=name) for name, (cap, png) in sorted(images.items()))
    blocks = list(sections)
    if figs:
        blocks.append(Section("figures", "Figures", figs, order=60))
    blocks.append(Section("numbers", "Numbers (rounded; full precision in the JSON file)",
                          tuple(dict_tables(figures)), order=80))
    blocks.append(Section("inputs", "Inputs", tuple(dict_tables(inputs)), order=90))
    if notes:
        blocks.append(Section("notes", "Model and approximations", (Text(items=tuple(notes)),), order=95))
    return render_page(title=title, caution=caution, sections=blocks)


# ------------------------------------------------------------------------------------------------------------------
# The compile report
# ------------------------------------------------------------------------------------------------------------------

def _threshold_text(item: dict) -> tuple[str, str]:
    for w, f, op in (("warn_below", "fail_below", ">="), ("warn_above", "fail_above", "<=")):
        if w in item:
            return f"pass {op} {float(item[w]):g}", f"fail {'<' if op == '>=' else '>'} {float(item[f]):g}"
    if "design" in item:
        return f"pass = {item['design']}", f"fail != {item['design']}"
    return "-", "-"


def verdict_section(verdicts: dict, *, order: int = 10) -> Section:
    """The headline table: one row per judged figure (check, figure, value, unit, thresholds, verdict)."""
    rows = []
    for check, b in verdicts["by_check"].items():
        for i in b["items"]:
            value = i.get("value")
            unit = {"1": "", "count": "count"}.get(i.get("unit", ""), i.get("unit", ""))
            warn, fail = _threshold_text(i)
            rows.append((check, i.get("what", i.get("key", "")), fmt_number(value) if value is not None else
                         "not measured", unit, warn, fail, i["verdict"]))
    overall = verdicts["overall"]
    reasons = "; ".join(verdicts.get("reasons", [])) or "every figure within its thresholds"
    return Section("verdicts", "Verdicts", (
        Table(("verdict", "reasons"), ((overall, reasons),), title="overall"),
        Table(("check", "figure", "value", "unit", "passes when", "fails when", "verdict"), tuple(rows),
              caption="Warn lies between the two thresholds. A figure that could not be measured is a warn, never a "
                      "pass. Thresholds: the defaults of metalay.design.limits with the design's [checks.limits]."),
    ), order=order)


def _rules_section(rules: dict | None, margins: dict | None, overview_png: bytes | None) -> Section:
    if not rules:
        return Section("rules", "Design rules", (Text("The design-rule check was not run (--no-checks or "
                                                     "[checks] rules = false)."),), order=20)
    m = (margins or {}).get("rules", {})
    rows = []
    for r in rules.get("results", []):
        mr = m.get(r["rule"]) if r.get("layer") is not None else None
        worst = "-" if r.get("worst_value") is None else fmt_number(float(r["worst_value"]))
        where = "-" if not r.get("worst_xy_um") else ", ".join(fmt_number(float(c)) for c in r["worst_xy_um"])
        rows.append((f"{r['layer']}/{r['datatype']}", r["rule"], f"{float(r['limit']):g}", r["unit"],
                     fmt_number(int(r["checked"])), fmt_number(int(r["count"])), worst, where,
                     "-" if mr is None or mr["measured"] is None else fmt_number(mr["measured"]),
                     "-" if mr is None else fmt_number(mr["margin"]),
                     "-" if mr is None else f"{100 * mr['relative_margin']:.1f} %",
                     "pass" if r["count"] == 0 else "fail"))
    cap = ("Margin: how far the tightest element is from the limit (positive passes), measured on the "
           f"{margins['window_polygons']:,} polygons nearest the middle of the structures; the violation counts "
           "cover every polygon." if margins else "Margins not measured (large mask, complement tone or no rules).")
    blocks = [Text(f"{rules.get('total_violations', 0):,} violations on {rules.get('polygons', 0):,} polygons "
                   f"(rules: {rules.get('rules', '?')}); status {rules.get('status', '?')}."),
              Table(("layer", "rule", "limit", "unit", "checked", "violations", "worst", "worst at (x, y) um",
                     "measured extreme", "margin", "relative margin", "verdict"), tuple(rows), caption=cap)]
    reasons = tuple(f"{r['rule']}: {r['reason']}" + (f" ({r['source']})" if r.get("source") else "")
                    for r in rules.get("results", []))
    blocks.append(Text("Why each rule:", items=reasons))
    if rules.get("total_violations", 0) and overview_png is not None:
        blocks.append(Figure("where the violations are: red crosses at the listed violations (up to 20 per rule; "
                             "all of them in the marker file of metalay rules check)", overview_png))
    if "complement_pieces" in rules:
        blocks.append(Text(rules.get("note", "")))
    return Section("rules", "Design rules", tuple(blocks), order=20)


def _files_table(manifest: dict) -> Table:
    rows = tuple((k, f["name"], fmt_number(int(f["bytes"])), f["sha256"]) for k, f in
                 sorted(manifest.get("files", {}).items()))
    return Table(("format", "file", "bytes", "SHA-256"), rows)


def compile_report(manifest: dict, sections=(), *, overview_png: bytes | None = None,
                   margins: dict | None = None) -> str:
    """The compile report: headline verdicts, design rules (margins, where violations are), whole-mask overview,
    the checks' sections, warnings, the manifest's numbers grouped with units, the design echo and the files.

    Parameters
    ----------
    manifest : dict
        The compile's manifest (``verdicts``, ``checks``, ``counts``, ``errors``, ``caution``...).
    sections : sequence of Section
        Sections handed back by the checks (e.g. the optical check's far field and phase error).
    overview_png : bytes, optional
        The whole-mask figure (:func:`metalay.checks.plots.mask_overview`).
    margins : dict, optional
        :func:`metalay.checks.steps.rule_margins_window` of the structures.

    Returns
    -------
    str
        The HTML text; the same manifest and sections give the same text.
    """
    v = manifest["verdicts"]
    design = manifest["design"]
    out = [verdict_section(v), _rules_section(manifest.get("checks", {}).get("rules"), margins, overview_png)]
    if overview_png is not None:
        out.append(Section("overview", "Whole mask", (Figure(
            "the whole mask as written: patterned region (the aperture the elements fill), frame, alignment marks, "
            "label and write-field boundaries (dotted), design-rule violations as red crosses", overview_png),),
            order=30))
    out.extend(sections)
    warn = manifest.get("warnings", [])
    out.append(Section("warnings", "Warnings", (Text(items=tuple(warn)) if warn else Text("No warnings."),),
                       order=70))
    numbers = {k: manifest[k] for k in ("counts", "errors", "illumination", "process", "mask") if k in manifest}
    numbers["library"] = {k: val for k, val in manifest.get("library", {}).items() if k != "responses"}
    optics = manifest.get("checks", {}).get("optics", {}).get("figures")
    tables = dict_tables(numbers)
    if optics:
        tables += [Table(t.columns, t.rows, title=f"optics: {t.title}") for t in
                   dict_tables(optics, skip=("verdicts", "inputs", "oam", "oam_channels", "fringe_reading", "grid"))]
    out.append(Section("numbers", "Numbers (rounded; full precision in manifest.json)", tuple(tables), order=80))
    out.append(Section("design", f"Design {design['name']} ({design['source']})",
                       tuple(dict_tables(design.get("echo", {}))), order=90))
    out.append(Section("files", "Files", (_files_table(manifest),
                                           Text(f"design hash {manifest.get('design_hash', '-')}")), order=95))
    subtitle = f"Overall verdict: {v['overall'].upper()}" + (f" ({'; '.join(v['reasons'])})" if v["reasons"] else "")
    return render_page(title=f"metalay compile report: {design['name']}", caution=manifest["caution"],
                       sections=out, subtitle=subtitle)
