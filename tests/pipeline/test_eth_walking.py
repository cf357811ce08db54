"""Groups found in a real pedestrian sequence against its annotated walking groups.

Source: the "eth" sequence of the ETH walking pedestrians data (Pellegrini, Ess,
Schindler & van Gool, ICCV 2009), in ../shared/datasets/eth_walking/ with its
annotators' groups.txt. Skipped when the folder is absent; the data are never
copied into the repository.
"""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd
import pytest
from conftest import SHARED_DATASETS

from comove.pipeline.core import groups

ETH = SHARED_DATASETS / "eth_walking"
pytestmark = pytest.mark.skipif(
    not (ETH / "obsmat.txt").is_file(), reason="eth_walking dataset not present"
)


def pairs_of(id_lists):
    """Return the unordered pairs of distinct ids that share a list."""
    out = set()
    for ids in id_lists:
        out |= set(itertools.combinations(sorted(set(ids)), 2))
    return out


def eth_tracks() -> pd.DataFrame:
    # obsmat columns: frame, pedestrian id, pos_x, pos_z (unused), pos_y, v_x, v_z, v_y;
    # frames step by 6 at 2.5 annotated frames per second (SOURCE.md)
    raw = np.loadtxt(ETH / "obsmat.txt")
    return pd.DataFrame(
        {"id": raw[:, 1].astype(int), "time": raw[:, 0] / 6 * 0.4, "x": raw[:, 2], "y": raw[:, 4]}
    )


def test_pedestrian_preset_recovers_the_annotated_groups():
    lines = [
        [int(v) for v in line.split()]
        for line in (ETH / "groups.txt").read_text().splitlines()
        if line.strip()
    ]
    # SOURCE.md counts 176 same-group pairs; one line lists an id twice, and
    # that "pair" of a pedestrian with itself is not scored (175 remain)
    with_self = set()
    for ids in lines:
        with_self |= set(itertools.combinations(sorted(ids), 2))
    assert len(with_self) == 176
    truth = pairs_of(lines)
    assert len(truth) == 175
    result = groups(eth_tracks(), preset="pedestrians", step=0.4)
    predicted = pairs_of([int(v) for v in m.split(";")] for m in result.episodes["members"])
    tp = len(predicted & truth)
    precision = tp / len(predicted)
    recall = tp / len(truth)
    f1 = 2 * precision * recall / (precision + recall)
    print(
        f"\neth_walking, preset pedestrians: {len(truth)} annotated pairs, "
        f"{len(predicted)} predicted; precision {precision:.3f}, recall {recall:.3f}, "
        f"F1 {f1:.3f}"
    )
    assert f1 >= 0.80
