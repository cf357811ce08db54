"""What a user runs: :func:`mine`, :func:`groups`, :func:`focal`, :func:`sweep`; stages forward.

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
from comove.pipeline.focal import FOCAL_STAGES, FocalResult, focal
from comove.pipeline.sweep import SWEEP_STAGES, SweepParams, SweepResult, sweep

__all__ = [
    "FOCAL_STAGES", "GROUP_STAGES", "MINE_STAGES", "SWEEP_STAGES", "FocalResult", "GroupsResult",
    "MiningResult", "SweepParams", "SweepResult", "focal", "groups", "mine", "split_options",
    "sweep",
]  # fmt: skip
