"""Single-page HTML report of an optical check: figures (embedded PNG), numbers, inputs and their hashes, caution.

The page is self-contained (images as base64 data URIs), has no dates and no scripts, and the same inputs give
the same bytes.
"""

from __future__ import annotations

import base64
import html
import json

__all__ = ["render_html", "flatten_figures"]

_STYLE = """
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;max-width:1100px;margin:24px auto;color:#1d2a33;
line-height:1.4;padding:0 16px}
h1{font-size:1.5em;border-bottom:2px solid #3b6e8f;padding-bottom:4px}h2{font-size:1.15em;color:#3b6e8f}
.caution{background:#fff4e0;border-left:5px solid #d9822b;padding:8px 12px;margin:12px 0}
table{border-collapse:collapse;font-size:.9em}td,th{border:1px solid #c8d3da;padding:3px 8px;text-align:left}
th{background:#eef3f6}.figs{display:flex;flex-wrap:wrap;gap:12px}.figs figure{margin:0;max-width:520px}
figcaption{font-size:.85em;color:#4b5b66}img{max-width:100%}code{font-size:.9em}
"""


def flatten_figures(d: dict, prefix: str = "") -> list[tuple[str, str]]:
    """Nested dict of numbers -> sorted (dotted key, text) rows; long lists are summarised."""
    rows = []
    for key in sorted(d):
        val = d[key]
        name = f"{prefix}{key}"
        if isinstance(val, dict):
            rows.extend(flatten_figures(val, name + "."))
        elif isinstance(val, float):
            rows.append((name, f"{val:.6g}"))
        elif isinstance(val, (list, tuple)):
            text = json.dumps(val, sort_keys=True, default=float)
            rows.append((name, text if len(text) <= 160 else text[:157] + "..."))
        else:
            rows.append((name, str(val)))
    return rows


def render_html(*, title: str, caution: str, inputs: dict, figures: dict, images: dict, notes=()) -> str:
    """Render the report.

    Parameters
    ----------
    title : str
        Page heading.
    caution : str
        Safety caution shown at the top.
    inputs : dict
        Input description (paths, SHA-256, settings); shown as a table.
    figures : dict
        Numbers of the check (nested dicts allowed); shown as a table.
    images : dict name -> (caption, png bytes)
        Figures, embedded in name order.
    notes : sequence of str
        Modelling notes and approximations (stated in the report).

    Returns
    -------
    str
        The HTML text (UTF-8, LF line ends).
    """
    esc = html.escape
    out = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">', f"<title>{esc(title)}</title>",
           f"<style>{_STYLE}</style></head><body>", f"<h1>{esc(title)}</h1>",
           f'<div class="caution"><strong>Caution.</strong> {esc(caution)}</div>']
    out.append("<h2>Inputs</h2><table>")
    for k, v in flatten_figures(inputs):
        out.append(f"<tr><th>{esc(k)}</th><td><code>{esc(v)}</code></td></tr>")
    out.append("</table>")
    out.append("<h2>Figures</h2><div class=\"figs\">")
    for name in sorted(images):
        caption, png = images[name]
        data = base64.b64encode(png).decode("ascii")
        out.append(f'<figure><img alt="{esc(name)}" src="data:image/png;base64,{data}">'
                   f"<figcaption>{esc(caption)}</figcaption></figure>")
    out.append("</div><h2>Numbers</h2><table>")
    for k, v in flatten_figures(figures):
        out.append(f"<tr><th>{esc(k)}</th><td>{esc(v)}</td></tr>")
    out.append("</table>")
    if notes:
        out.append("<h2>Model and approximations</h2><ul>")
        out.extend(f"<li>{esc(n)}</li>" for n in notes)
        out.append("</ul>")
    out.append("</body></html>")
    return "\n".join(out) + "\n"
