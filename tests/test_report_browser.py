"""The report in a real browser: headless Chromium loads it without console messages and
a screenshot shows the figures.

Needs Debian's ``chromium`` package (``scripts/install_browser.sh``); skipped, saying so,
when ``/usr/bin/chromium`` is missing. The report has no JavaScript, so *any* console
message (a failed resource, a blocked load, a script error) counts as a failure; a
control page that logs an error checks that the scan sees such messages at all.
"""

from __future__ import annotations

import subprocess
from pathlib import Path

import numpy as np
import pytest

from test_report import build_small_campaign, small_replay

pytestmark = pytest.mark.browser

CHROMIUM = Path("/usr/bin/chromium")
FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--hide-scrollbars", "--enable-logging=stderr", "--v=0")
#: Seconds a single headless Chromium run may take on a busy 2-core machine.
TIMEOUT_S = 180
#: Okabe-Ito blue and vermillion (Okabe and Ito 2002), the bar colours of the figures.
BLUE = np.array([0x00, 0x72, 0xB2]) / 255
VERMILLION = np.array([0xD5, 0x5E, 0x00]) / 255

if not CHROMIUM.is_file():  # pragma: no cover - depends on the machine
    pytest.skip("headless Chromium is not installed (/usr/bin/chromium missing); "
                "run scripts/install_browser.sh", allow_module_level=True)


def chromium(url: str, profile: Path, *extra: str) -> subprocess.CompletedProcess:
    """Run headless Chromium once on ``url`` with a throw-away profile folder."""
    return subprocess.run(
        [str(CHROMIUM), *FLAGS, f"--user-data-dir={profile}", *extra, url],
        capture_output=True, text=True, timeout=TIMEOUT_S, check=False,
    )


def console_messages(stderr: str) -> list[str]:
    """Lines of Chromium's log that are page console messages or failed loads."""
    return [line for line in stderr.splitlines()
            if ":CONSOLE" in line or "net::ERR_" in line or "Not allowed to load" in line]


@pytest.fixture(scope="module")
def report(tmp_path_factory) -> Path:
    from prescreen.report import build_report

    root = tmp_path_factory.mktemp("browser")
    camp, proposed, _ = build_small_campaign(root / "camp")
    try:
        path = build_report(camp, out_path=root / "report.html", replay_curves=small_replay(camp))
    finally:
        camp.close()
    return path


def test_console_scan_sees_errors(tmp_path):
    page = tmp_path / "bad.html"
    page.write_text('<!DOCTYPE html><html><body><p>x</p>'
                    '<script>console.error("prescreen-control-marker")</script></body></html>')
    run = chromium(page.as_uri(), tmp_path / "profile", "--dump-dom")
    assert run.returncode == 0, run.stderr[-2000:]
    assert any("prescreen-control-marker" in m for m in console_messages(run.stderr))


def test_report_loads_without_console_messages(report, tmp_path):
    run = chromium(report.as_uri(), tmp_path / "profile", "--dump-dom")
    assert run.returncode == 0, run.stderr[-2000:]
    assert console_messages(run.stderr) == []
    dom = run.stdout
    assert "Allocation report" in dom
    n_img = report.read_text(encoding="utf-8").count("<img ")
    assert n_img > 0 and dom.count("<img ") == n_img
    for fid in ("fig-expected-hits", "fig-roc", "fig-pr", "fig-calibration", "fig-discovery",
                "fig-shap-bar", "fig-shap-beeswarm", "fig-cost"):
        assert f'id="{fid}"' in dom


def test_screenshot_shows_the_figures(report, tmp_path):
    from matplotlib.image import imread

    shot = tmp_path / "report.png"
    run = chromium(report.as_uri(), tmp_path / "profile", f"--screenshot={shot}",
                   "--window-size=1280,5000")
    assert run.returncode == 0, run.stderr[-2000:]
    assert console_messages(run.stderr) == []
    img = imread(shot)[..., :3]
    assert img.shape[:2] == (5000, 1280)
    non_white = np.any(img < 0.95, axis=-1).mean()
    assert non_white > 0.05  # text, tables and figures, not a blank page
    for colour in (BLUE, VERMILLION):  # bars of the summary figure and of the waterfalls
        near = np.all(np.abs(img - colour) < 0.03, axis=-1).sum()
        assert near > 500


def test_optional_pdf(report, tmp_path):
    from prescreen.report import write_pdf

    pdf = write_pdf(report, tmp_path / "report.pdf")
    assert pdf is not None
    data = pdf.read_bytes()
    assert data.startswith(b"%PDF-") and len(data) > 50_000  # the figures are in it
