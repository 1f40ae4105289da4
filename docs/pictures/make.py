"""Make the README's pictures from the built-in demo (an invented design: charge-3 vortex tilted by 4 deg, 532 nm).

Usage::

    .venv/bin/python docs/pictures/make.py          # writes docs/pictures/*.png (each < 200 kB)

Compiles the demo into a temporary folder, takes three figures from its report.html (the whole-mask overview, the
far field on the designed spot, the phase error) and a screenshot of the top of the report in headless Chromium
(the system package ``chromium``; skipped with a message when it is missing). Palette-reduced PNGs keep the files
small; the same demo gives the same pictures.
"""

from __future__ import annotations

import base64
import html
import io
import re
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

from PIL import Image

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent.parent
#: report figure (start of its caption) -> picture file
WANTED = {"the whole mask as written": "demo-mask-overview.png",
          "far-field power around the designed spot": "demo-far-field.png",
          "phase of the converted field decoded": "demo-phase-error.png"}
MAX_BYTES = 200_000


def _small_png(data: bytes, colours: int = 96) -> bytes:
    img = Image.open(io.BytesIO(data)).convert("RGB")
    out = io.BytesIO()
    img.quantize(colors=colours, method=Image.Quantize.MEDIANCUT).save(out, format="PNG", optimize=True)
    return out.getvalue()


def _figures(report_html: str) -> dict:
    found = {}
    for alt, data in re.findall(r'<img alt="([^"]*)" src="data:image/png;base64,([^"]+)"', report_html):
        alt = html.unescape(alt)
        for start, name in WANTED.items():
            if alt.startswith(start) and name not in found:
                found[name] = base64.b64decode(data)
    return found


def _screenshot(report: Path, target: Path) -> bool:
    exe = shutil.which("chromium") or shutil.which("chromium-browser")
    if exe is None:
        print("chromium not found (install the system package chromium): report screenshot skipped")
        return False
    with tempfile.TemporaryDirectory() as profile:
        shot = Path(profile) / "shot.png"
        subprocess.run([exe, "--headless=new", "--no-sandbox", "--disable-gpu", f"--user-data-dir={profile}",
                        "--hide-scrollbars", f"--screenshot={shot}", "--window-size=1100,1000",
                        report.resolve().as_uri()], check=True, capture_output=True, timeout=120)
        target.write_bytes(_small_png(shot.read_bytes(), colours=64))
    return True


def main() -> int:
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp) / "demo"
        subprocess.run([sys.executable, "-m", "metalay.cli", "demo", "-o", str(out), "--quiet"], check=True,
                       cwd=ROOT)
        report = out / "report.html"
        figs = _figures(report.read_text(encoding="utf-8"))
        missing = set(WANTED.values()) - set(figs)
        if missing:
            print(f"figures not found in the report: {sorted(missing)}")
            return 1
        written = []
        for name, data in sorted(figs.items()):
            (HERE / name).write_bytes(_small_png(data))
            written.append(HERE / name)
        if _screenshot(report, HERE / "demo-report-top.png"):
            written.append(HERE / "demo-report-top.png")
    for path in written:
        size = path.stat().st_size
        print(f"{path.relative_to(ROOT)}: {size / 1000:.0f} kB" + ("  (over 200 kB!)" if size > MAX_BYTES else ""))
    return 1 if any(p.stat().st_size > MAX_BYTES for p in written) else 0


if __name__ == "__main__":
    sys.exit(main())
