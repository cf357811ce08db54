"""Where input files live: local paths, and object-store addresses read through fsspec.

An input named by an address with a scheme (``s3://bucket/fleet/day-01.parquet``,
``gs://…``, ``az://…``, ``https://…``, or fsspec's ``memory://`` in tests) is read
through the fsspec filesystem registered for that scheme; every other name is a
local path. The readers ask this module for what differs: listing a pattern,
opening a (possibly compressed) stream, the filesystem to hand to pyarrow, and a
file's size. Results are always written to a local folder.

fsspec and the store's own package (``s3fs`` for ``s3://``, ``gcsfs`` for
``gs://``, ``adlfs`` for ``az://``) are needed only for such addresses; without
them the message says what to install. Credentials are the store package's
usual ones (environment variables or its configuration files).
"""

from __future__ import annotations

import glob
import os
import re
from typing import Any

from comove.errors import InputError

#: ``scheme://`` at the start of a name: an address for fsspec. One-letter schemes
#: are left out, so that a Windows drive (``C:/``) is never taken for one.
_ADDRESS = re.compile(r"^[A-Za-z][A-Za-z0-9+.-]+://")


def is_address(name: str | os.PathLike[str]) -> bool:
    """Tell whether ``name`` is an fsspec address (``scheme://…``) rather than a local path."""
    return isinstance(name, str) and _ADDRESS.match(name) is not None


def filesystem(address: str) -> tuple[Any, str]:
    """Return the fsspec filesystem of ``address`` and the path within it.

    Raises
    ------
    InputError
        When fsspec, or the package of the address's scheme, is not installed.
    """
    try:
        from fsspec.core import url_to_fs
    except ImportError:
        raise InputError(
            f"{address}: reading from an object store needs fsspec; install it with "
            "pip install fsspec, with the store's package (s3fs, gcsfs or adlfs)"
        ) from None
    try:
        return url_to_fs(address)
    except (ImportError, ValueError) as exc:
        scheme = address.split("://", 1)[0]
        raise InputError(
            f"{address}: cannot read {scheme}:// addresses here ({_first_line(exc)}); "
            "install the fsspec package for this store, or copy the file to a local folder"
        ) from None


def expand(address: str) -> list[str]:
    """Return the files an address names: itself, or the files matching its pattern.

    Raises
    ------
    InputError
        When nothing matches, the address is a folder, or it does not exist.
    """
    fs, path = filesystem(address)
    try:
        if glob.has_magic(path) and not fs.isfile(path):
            matches = sorted(p for p in fs.glob(path) if fs.isfile(p))
            if not matches:
                raise InputError(
                    f"{address}: no files match this pattern; check the pattern and folder"
                )
            return [fs.unstrip_protocol(p) for p in matches]
        if fs.isdir(path):
            raise InputError(
                f"{address}: is a folder; give a file, or a pattern such as "
                f"{address.rstrip('/')}/*.csv"
            )
        if not fs.exists(path):
            raise InputError(f"{address}: no such file; check the address")
    except OSError as exc:  # the store refused: credentials, network, permissions
        raise InputError(f"{address}: cannot reach the file ({_first_line(exc)})") from None
    return [address]


def open_input(name: str, compression: str | None = None, **text: Any) -> Any:
    """Open a local file or an address for reading, decompressing with ``compression``.

    ``compression`` is a module name of the standard library (``gzip``, ``bz2``,
    ``lzma``) or None. With ``text`` (``encoding``, ``errors``, ``newline``) the
    stream is text, else bytes. The result is a context manager.
    """
    mode = "rt" if text else "rb"
    if not is_address(name):
        if compression is None:
            return open(name, mode, **text)  # noqa: SIM115 - the caller closes it
        import importlib

        return importlib.import_module(compression).open(name, mode, **text)
    filesystem(name)  # a clear message when fsspec or the store's package is missing
    import fsspec

    return fsspec.open(name, mode, compression=compression, **text).open()


def arrow_location(name: str) -> tuple[str, Any]:
    """Return (path, filesystem) for pyarrow's readers: the name and None for a local file."""
    if not is_address(name):
        return name, None
    fs, path = filesystem(name)
    return path, fs


def size(name: str) -> int:
    """Return the size in bytes of a local file or of the object at an address."""
    if not is_address(name):
        return os.path.getsize(name)
    fs, path = filesystem(name)
    return int(fs.size(path))


def base_name(name: str) -> str:
    """Return the last component of a local path or an address (``day-01.parquet``)."""
    return name.rstrip("/").replace("\\", "/").rsplit("/", 1)[-1]


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__
