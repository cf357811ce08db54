"""The report renders in a real browser: headless Chromium, when installed."""

from __future__ import annotations

import shutil
import subprocess

import matplotlib.image as mpimg
import numpy as np
import pytest

from comove.io.scenarios import mine_options
from comove.pipeline.core import groups, mine

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
pytestmark = pytest.mark.skipif(CHROMIUM is None, reason="chromium is not installed")

# flags for a closed network and a root user, as a headless probe needs them
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--enable-logging=stderr", "--v=0"]  # fmt: skip


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    from comove.present.report import build_report

    folder = tmp_path_factory.mktemp("res") / "game"
    source, options = mine_options("small_sided_game")
    mine(source, **options, replicates=0).write(folder)
    cols = {k: options[k] for k in ("id", "time", "x", "y", "role", "step")}
    groups(source, preset="team-sport", radius=3.0, replicates=0, **cols).write(folder, merge=True)
    return build_report(folder)


def browse(report, tmp_path, *extra):
    profile = tmp_path / "profile"
    return subprocess.run(
        [CHROMIUM, *FLAGS, f"--user-data-dir={profile}", *extra, report.as_uri()],
        capture_output=True,
        text=True,
        timeout=120,
    )


def test_report_loads_without_console_errors(report, tmp_path):
    done = browse(report, tmp_path, "--dump-dom")
    assert done.returncode == 0, done.stderr[-2000:]
    assert "<img" in done.stdout and "</html>" in done.stdout
    console = [line for line in done.stderr.splitlines() if "CONSOLE" in line]
    assert not [line for line in console if "rror" in line or "Uncaught" in line], console


def test_report_screenshot_is_not_blank(report, tmp_path):
    shot = tmp_path / "shot.png"
    done = browse(
        report, tmp_path, f"--screenshot={shot}", "--window-size=1200,1600", "--hide-scrollbars"
    )
    assert done.returncode == 0 and shot.is_file(), done.stderr[-2000:]
    pixels = mpimg.imread(shot)
    assert pixels.shape[0] >= 1000
    # not a blank page: many distinct colours, and not almost all one value
    flat = pixels[..., :3].reshape(-1, 3)
    assert np.unique(np.round(flat, 2), axis=0).shape[0] > 50
    assert flat.std() > 0.05
