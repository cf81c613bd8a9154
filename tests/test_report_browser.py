"""The report's page opened in a real browser: headless Chromium (the Debian package) takes a
screenshot of a dry run's page at a laptop's window width.

Slow (a dry run, the report and a browser start): ``pytest -m slow tests/test_report_browser.py``.
Skipped, with the reason, when no Chromium is installed (``apt-get install chromium``).
"""

from __future__ import annotations

import shutil
import subprocess
import tempfile
from pathlib import Path

import pytest

from autotune import report
from cli_helpers import DryRun

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), section 5.2
LAPTOP = (1366, 2400)  # a common laptop screen's width (px), and a tall window to see more

pytestmark = pytest.mark.slow


def _chromium() -> str:
    for name in ("chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    pytest.skip("no Chromium on this machine (Debian: apt-get install chromium)")


def test_the_page_of_a_dry_run_opens_in_chromium_with_figures_side_by_side(
        tmp_path: Path, readme_dry_run: DryRun) -> None:
    """Chromium renders the page from the file alone (no network: every image is inline and
    decodes); at a laptop's width the first stage's first two figures share a row, each at least
    560 px wide, and the timeline spans wider."""
    browser = _chromium()
    done = readme_dry_run  # the session's one README dry run (conftest.py): read only
    assert done.returncode == 0 and done.folder is not None, done.stderr[-3000:]
    dry = done.folder
    out = tmp_path / "page"
    report.write_report(dry, out=out)
    page = out / report.HTML_NAME
    # The page alone, moved away from its PNG files, must still show every figure.
    alone = tmp_path / "mailed" / "report.html"
    alone.parent.mkdir()
    shutil.copy(page, alone)
    shot = tmp_path / "shot.png"
    profile = tempfile.mkdtemp(dir=tmp_path)
    result = subprocess.run(
        [browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
         "--no-first-run", "--disable-background-networking", "--disable-component-update",
         "--disable-sync", f"--user-data-dir={profile}", "--hide-scrollbars",
         f"--window-size={LAPTOP[0]},{LAPTOP[1]}", f"--screenshot={shot}", alone.as_uri()],
        capture_output=True, text=True, timeout=120, stdin=subprocess.DEVNULL)
    assert result.returncode == 0, result.stderr[-3000:]
    assert shot.read_bytes()[:8] == PNG_SIGNATURE
    import matplotlib.image as mpimg

    image = mpimg.imread(shot)
    assert image.shape[1] == LAPTOP[0] and image.shape[0] == LAPTOP[1]
    grey = image[..., :3].mean(axis=2)
    assert (grey < 0.9).mean() > 0.05  # not a blank page: text and figures drawn
    # Figures side by side: a copy of the page with a script that writes where each figure
    # landed (the page itself has no script), its DOM dumped by the same browser.
    probe = tmp_path / "probe.html"
    probe.write_text(alone.read_text(encoding="utf-8").replace("</body>", (
        "<script>document.body.insertAdjacentHTML('beforeend', '<pre id=\"layout\">' + "
        "Array.from(document.querySelectorAll('figure')).map(f => {const r = "
        "f.getBoundingClientRect(); const i = f.querySelector('img'); return [f.id, "
        "Math.round(r.left), Math.round(r.top), Math.round(r.width), i.naturalWidth]"
        ".join(' ')}).join('\\n') + '</pre>');</script></body>")), encoding="utf-8")
    dom = subprocess.run(
        [browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
         "--no-first-run", "--disable-background-networking", "--disable-component-update",
         "--disable-sync", f"--user-data-dir={tempfile.mkdtemp(dir=tmp_path)}",
         f"--window-size={LAPTOP[0]},{LAPTOP[1]}", "--dump-dom", probe.as_uri()],
        capture_output=True, text=True, timeout=120, stdin=subprocess.DEVNULL)
    assert dom.returncode == 0, dom.stderr[-3000:]
    layout = dom.stdout.rsplit('<pre id="layout">', 1)[1].split("</pre>")[0].split("\n")
    boxes = {fid: (int(x), int(y), int(w), int(n))
             for fid, x, y, w, n in (line.split() for line in layout if line.strip())}
    built = report.build_report(dry, draw=False)
    assert len(boxes) == len(list(out.glob("report-*.png")))
    assert all(n > 0 for *_, n in boxes.values())  # every inline image decoded
    fringes, phase = boxes["fig-calibrate-fringes"], boxes["fig-calibrate-phase-shift"]
    assert fringes[1] == phase[1] and phase[0] > fringes[0] + fringes[2] - 1  # same row
    assert fringes[2] >= 560 and fringes[0] + 2 * fringes[2] <= LAPTOP[0]  # two fit the screen
    assert built.runs and boxes["fig-run-timeline"][2] > fringes[2]  # the timeline spans wider
