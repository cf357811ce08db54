"""comove: durable co-location of object roles, and co-moving groups, in trajectory data."""

from __future__ import annotations

from importlib.metadata import PackageNotFoundError, version
from typing import TYPE_CHECKING, Any

from comove.errors import InputError

try:
    __version__ = version("comove")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0.0.0+unknown"

if TYPE_CHECKING:
    from comove.pipeline.core import GroupsResult, MiningResult, groups, mine
    from comove.pipeline.focal import FocalResult, focal

__all__ = [
    "FocalResult", "GroupsResult", "InputError", "MiningResult", "__version__", "focal", "groups",
    "mine",
]  # fmt: skip

_FROM_PIPELINE = {"FocalResult", "GroupsResult", "MiningResult", "focal", "groups", "mine"}


def __getattr__(name: str) -> Any:
    """Import the pipeline on first use of its names (PEP 562).

    ``import comove.cli`` then runs the command line's own start-up settings
    before numpy and the other numeric libraries are loaded.
    """
    if name in _FROM_PIPELINE:
        from comove import pipeline

        return getattr(pipeline, name)
    raise AttributeError(f"module 'comove' has no attribute {name!r}")
