"""What a run was made from: input digest, settings and versions."""

from __future__ import annotations

import glob
import hashlib
import platform
from collections.abc import Iterable
from dataclasses import asdict, fields, is_dataclass
from datetime import UTC, datetime
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path
from typing import Any

import pandas as pd

import comove
from comove.io import storage

_VERSIONED = ("numpy", "scipy", "pandas", "pyarrow", "geopandas", "shapely", "pyproj")


def _paths(source: Any) -> list[str] | None:
    """Return the files behind ``source`` when it names files, else None.

    Local files as absolute paths; object-store addresses as they are.
    """
    items: Iterable[Any] = source if isinstance(source, (list, tuple)) else [source]
    paths: list[str] = []
    for item in items:
        if not isinstance(item, (str, Path)):
            return None
        text = str(item)
        if storage.is_address(text):
            paths.extend(storage.expand(text))
            continue
        matched = sorted(glob.glob(text)) if glob.has_magic(text) else [text]
        paths.extend(str(Path(m).resolve()) for m in matched)
    return sorted(set(paths))


def input_digest(source: Any) -> str:
    """Return ``sha256:<hex>`` of the input's bytes (files) or of its values (frames).

    For files the digest covers each file's name and content in sorted order,
    so renaming or editing any file changes it. For in-memory frames it covers
    pandas' row hashes of the columns, index excluded.
    """
    h = hashlib.sha256()
    paths = _paths(source)
    if paths is not None:
        for path in paths:
            h.update(storage.base_name(path).encode() + b"\0")
            with storage.open_input(path) as fh:
                for block in iter(lambda fh=fh: fh.read(1 << 20), b""):
                    h.update(block)
        return "sha256:" + h.hexdigest()
    frame = source
    if hasattr(source, "trajectories"):  # a movingpandas TrajectoryCollection
        frame = pd.concat([t.df.assign(_traj=str(t.id)) for t in source.trajectories])
    if isinstance(frame, pd.DataFrame):
        plain = pd.DataFrame(frame).copy()
        if "geometry" in plain and hasattr(plain["geometry"], "to_wkb"):
            plain["geometry"] = plain["geometry"].to_wkb()
        h.update(pd.util.hash_pandas_object(plain, index=False).values.tobytes())
        return "sha256:" + h.hexdigest()
    raise TypeError(f"cannot hash an input of type {type(source).__name__}")


#: Settings recorded only when given: left out, they were not asked for (columns found
#: by their names; no scratch folder, scheduler or number of jobs named).
_RECORDED_WHEN_GIVEN = {
    "ColumnSpec", "WindowParams.scratch", "RunParams.scheduler", "RunParams.jobs", "ZoneParams",
}  # fmt: skip

#: Settings never shown: fixed by the command, not by its user.
_NOT_RECORDED = {"require_role"}


def settings_record(*stage_params: Any) -> dict[str, Any]:
    """Return the run's settings by their option names, as plain values.

    The keys are the option names of the command line and the run file
    (``min_prevalence`` for ``--min-prevalence``). Settings of stages that were
    not asked for are left out: the tests' settings when no test ran
    (``replicates`` 0; the seed too), cross-K's without ``k_radii``, the areas'
    name column without areas, and the
    settings in ``_RECORDED_WHEN_GIVEN`` that were not given.
    """
    out: dict[str, Any] = {}
    staged = [p for p in stage_params if p is not None]
    if not all(is_dataclass(p) for p in staged):
        raise TypeError("stage settings must be dataclasses")
    names = {type(p).__name__: p for p in staged}
    tests = names.get("SignificanceParams")
    untested = tests is not None and getattr(tests, "replicates", 0) == 0
    for params in staged:
        stage = type(params).__name__
        values = asdict(params)
        if stage == "CrossKParams" and values.get("k_radii") is None:
            continue
        if stage == "SignificanceParams" and untested:
            values = {"replicates": 0}
        if stage == "ZoneParams" and values.get("areas") is None:
            values.pop("area_name", None)
        for f in fields(params):
            if f.name not in values or f.name in _NOT_RECORDED:
                continue
            given = values[f.name] is not None
            if not given and {stage, f"{stage}.{f.name}"} & _RECORDED_WHEN_GIVEN:
                continue
            if f.name == "seed" and untested:
                continue
            out[f.name] = values[f.name]
    return out


def run_record(
    command: str,
    source: Any,
    settings: dict[str, dict[str, Any]],
    extra: dict | None = None,
    digest: str | None = None,
) -> dict[str, Any]:
    """Return the content of ``run.json``: what was run, on what, with which versions.

    ``digest`` is ``input_digest(source)`` when already taken (it is computed
    otherwise).
    """
    versions = {"comove": comove.__version__, "python": platform.python_version()}
    for name in _VERSIONED:
        try:
            versions[name] = version(name)
        except PackageNotFoundError:
            versions[name] = None
    paths = _paths(source)
    return {
        "command": command,
        "created": datetime.now(UTC).isoformat(timespec="seconds").replace("+00:00", "Z"),
        # absolute, so that `--config run.json` repeats the run from any folder
        "input": paths if paths is not None else f"<{type(source).__name__}>",
        "input_digest": digest if digest is not None else input_digest(source),
        "settings": settings,
        "versions": versions,
        **(extra or {}),
    }
