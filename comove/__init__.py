"""comove: durable co-location of object roles, and co-moving groups, in trajectory data."""

from __future__ import annotations

from importlib.metadata import PackageNotFoundError, version

from comove.errors import InputError

try:
    __version__ = version("comove")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0.0.0+unknown"

__all__ = ["InputError", "__version__"]
