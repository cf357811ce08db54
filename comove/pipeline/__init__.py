"""What a user runs: :func:`mine`, :func:`groups` and :func:`sweep`, each stage forward.

The command line (:mod:`comove.cli`) is a thin layer over these functions.
"""

from comove.pipeline.core import (
    GROUP_STAGES,
    MINE_STAGES,
    GroupsResult,
    MiningResult,
    groups,
    mine,
    split_options,
)
from comove.pipeline.sweep import SWEEP_STAGES, SweepParams, SweepResult, sweep

__all__ = [
    "GROUP_STAGES", "MINE_STAGES", "SWEEP_STAGES", "GroupsResult", "MiningResult", "SweepParams",
    "SweepResult", "groups", "mine", "split_options", "sweep",
]  # fmt: skip
