"""comove: durable co-location of object roles, and co-moving groups, in trajectory data."""

from __future__ import annotations

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("comove")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0.0.0+unknown"

from comove.errors import InputError  # noqa: E402
from comove.pipeline import GroupsResult, MiningResult, groups, mine  # noqa: E402

__all__ = ["GroupsResult", "InputError", "MiningResult", "__version__", "groups", "mine"]
