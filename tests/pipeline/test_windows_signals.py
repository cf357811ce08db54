"""A run over time windows stopped by a signal leaves no scratch folder and no results."""

from __future__ import annotations

import signal
import subprocess
import sys
import time

import numpy as np
import pandas as pd
import pytest


def _tracks(path) -> None:
    rng = np.random.default_rng(0)
    n_obj, n_t = 120, 3000
    t = np.tile(np.arange(n_t, dtype=float), n_obj)
    frame = pd.DataFrame({
        "id": np.repeat([f"o{i}" for i in range(n_obj)], n_t), "time": t,
        "x": rng.normal(0, 1, t.size).cumsum(), "y": rng.normal(0, 1, t.size).cumsum(),
        "role": np.repeat([f"r{i % 4}" for i in range(n_obj)], n_t),
    })  # fmt: skip
    frame.to_parquet(path)


@pytest.mark.parametrize("signum", [signal.SIGTERM, signal.SIGINT])
@pytest.mark.parametrize("command", ["mine", "groups"])
def test_a_signal_mid_run_removes_the_scratch_folder(signum, command, tmp_path):
    _tracks(tmp_path / "tracks.parquet")
    scratch = tmp_path / "scratch"
    scratch.mkdir()
    out = tmp_path / "out"
    args = [sys.executable, "-m", "comove.cli", command, str(tmp_path / "tracks.parquet"),
            "--radius", "3", "--step", "1", "--replicates", "0", "--chunk", "20s",
            "--scratch", str(scratch), "--out", str(out), "--quiet"]  # fmt: skip
    program = subprocess.Popen(args, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 60
    while not list(scratch.glob("*/clean-*.npz")) and program.poll() is None:
        assert time.monotonic() < deadline
        time.sleep(0.02)
    assert program.poll() is None, "the run ended before it was signalled"
    program.send_signal(signum)
    _, err = program.communicate(timeout=60)
    assert program.returncode != 0
    assert "Traceback" not in err
    assert list(scratch.iterdir()) == []  # the scratch folder is gone
    assert not out.exists()
