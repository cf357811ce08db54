"""Pairwise precision, recall and F1 of ``comove groups --preset pedestrians``, setting by setting.

Run from the repository root::

    python benchmarks/group_sensitivity.py [--datasets ../shared/datasets]

Scores every pair of pedestrians put in one episode against the pairs put in one
group, on the annotated real scenes found under ``--datasets`` (``eth_walking``,
``ucy_zara01``: obsmat layout, 0.4 s between annotated frames) and on the
bundled invented dense crowd (``synthetic_tracks/dense_crowd``), first with the
preset as shipped, then with one setting changed at a time. Prints a Markdown
table for docs/groups.md. A scene whose folder is absent is left out.
"""

from __future__ import annotations

import argparse
import itertools
import json
import warnings
from pathlib import Path

import numpy as np
import pandas as pd

from comove.io.scenarios import SCENARIOS_DIR
from comove.pipeline.core import groups

#: real scene folder -> step of its frame numbers between annotated frames
REAL = {"eth_walking": 6, "ucy_zara01": 10}

#: (label, options changed from the preset)
ROWS = [
    ("preset as shipped", {}),
    ("links judged on the snapshot alone (the former rule)", {"links": "snapshot"}),
    ("evidence window 8 s", {"evidence_window": 8.0}),
    ("evidence window 20 s", {"evidence_window": 20.0}),
    ("evidence window 45 s", {"evidence_window": 45.0}),
    ("evidence share 0.3", {"evidence_share": 0.3}),
    ("evidence share 0.5", {"evidence_share": 0.5}),
    ("nearest off", {"nearest": 0}),
    ("nearest 2", {"nearest": 2}),
    ("nearest 5", {"nearest": 5}),
    ("side by side off", {"min_abreast": None}),
    ("side by side 30°", {"min_abreast": 30.0}),
    ("standing counts as together", {"standing": "together"}),
    ("standing counts as apart", {"standing": "apart"}),
    ("radius 1.2 m", {"radius": 1.2}),
    ("radius 2.0 m", {"radius": 2.0}),
    ("minimum duration 8 s", {"min_together_time": 8.0}),
]


def _pairs(id_lists) -> set[tuple]:
    out = set()
    for ids in id_lists:
        out |= set(itertools.combinations(sorted(set(ids)), 2))
    return out


def real_scene(folder: Path, step: int) -> tuple[pd.DataFrame, dict, set]:
    """Return the tracks, options and annotated pairs of an obsmat scene."""
    raw = np.loadtxt(folder / "obsmat.txt")
    frame = pd.DataFrame({"id": raw[:, 1].astype(int).astype(str), "time": raw[:, 0] / step * 0.4,
                          "x": raw[:, 2], "y": raw[:, 4]})  # fmt: skip
    text = (folder / "groups.txt").read_text()
    truth = _pairs(line.split() for line in text.splitlines() if line.strip())
    return frame, {"step": 0.4}, truth


def crowd_scene() -> tuple[str, dict, set]:
    """Return the input, options and planted pairs of the invented dense crowd."""
    folder = SCENARIOS_DIR / "dense_crowd"
    truth = json.loads((folder / "truth.json").read_text())
    options = dict(truth["columns"], step=truth["parameters"]["step"])
    return str(folder / truth["input"]), options, _pairs(g["members"] for g in truth["groups"])


def score(source, options: dict, truth: set) -> tuple[float, float, float]:
    """Return pairwise precision, recall and F1 of the preset with ``options``."""
    found = groups(source, preset="pedestrians", replicates=0, **options)
    predicted = _pairs(m.split(";") for m in found.episodes["members"])
    tp = len(predicted & truth)
    precision = tp / max(len(predicted), 1)
    recall = tp / len(truth)
    return precision, recall, 2 * precision * recall / max(precision + recall, 1e-12)


def main() -> None:
    """Print the table."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--datasets", type=Path, default=Path("../shared/datasets"))
    args = parser.parse_args()
    warnings.simplefilter("ignore")
    scenes = {name: real_scene(args.datasets / name, step) for name, step in REAL.items()
              if (args.datasets / name / "obsmat.txt").is_file()}  # fmt: skip
    scenes["dense crowd (invented)"] = crowd_scene()
    print("| setting | " + " | ".join(f"{n}: P / R / **F1**" for n in scenes) + " |")
    print("|---|" + "---:|" * len(scenes))
    for label, change in ROWS:
        cells = []
        for source, options, truth in scenes.values():
            p, r, f = score(source, {**options, **change}, truth)
            cells.append(f"{p:.2f} / {r:.2f} / **{f:.3f}**")
        print(f"| {label} | " + " | ".join(cells) + " |", flush=True)


if __name__ == "__main__":
    main()
