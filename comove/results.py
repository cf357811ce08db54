"""Write a results folder atomically: all of it or nothing, never half.

Files are written into a hidden sibling folder that is renamed into place only
when every file is complete. An existing folder is replaced only when the
caller asks (``force``), and then only after the new one is complete.
"""

from __future__ import annotations

import json
import os
import shutil
import tempfile
from collections.abc import Callable, Mapping
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from comove.errors import InputError

Writer = Callable[[Path], None]


def _plain(value: Any) -> Any:
    """Return ``value`` with numpy and pandas scalars turned into JSON types."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, pd.Timestamp):
        return iso_utc(value)
    if isinstance(value, Path):
        return str(value)
    return value


def iso_utc(ts: pd.Timestamp) -> str:
    """Return an ISO 8601 UTC text with a trailing ``Z``."""
    ts = ts.tz_convert("UTC") if ts.tzinfo else ts.tz_localize("UTC")
    return ts.isoformat().replace("+00:00", "Z")


class json_writer:  # noqa: N801 - used like the other writer factories
    """A writer of ``content`` as indented JSON (the content stays readable for merging)."""

    def __init__(self, content: Mapping[str, Any]) -> None:
        self.content = dict(content)

    def __call__(self, path: Path) -> None:
        """Write the content to ``path``."""
        path.write_text(json.dumps(_plain(self.content), indent=2, allow_nan=False) + "\n")


#: Files that two commands' results in one folder share, combined per command.
SHARED_JSON = ("run.json", "quality.json")
#: Files both commands write with the same content for one input: the newer is kept.
SHARED_SAME = ("track_sample.parquet",)


def _combined(existing: dict, new: dict, command: str, prior: str) -> dict:
    """Return ``existing`` (made by ``prior``) and ``new`` JSON content keyed by command."""
    merged = dict(existing["by_command"]) if "by_command" in existing else {prior: existing}
    merged[command] = new
    return {"by_command": merged}


def _prior_command(folder: Path) -> str:
    """Return the command that made a results folder, from its run.json."""
    try:
        run = json.loads((folder / "run.json").read_text())
    except (OSError, ValueError):
        return "earlier"
    return str(run.get("command", "earlier"))


def _iso_times(frame: pd.DataFrame) -> pd.DataFrame:
    """Return a copy of ``frame`` with its zone-aware time columns as ISO 8601 UTC text."""
    out = frame.copy()
    for col in out.columns:
        if isinstance(out[col].dtype, pd.DatetimeTZDtype):
            out[col] = out[col].dt.strftime("%Y-%m-%dT%H:%M:%S.%fZ")
    return out


def csv_writer(frame: pd.DataFrame) -> Writer:
    """Return a writer of ``frame`` as CSV, times as ISO 8601 UTC with ``Z``."""

    def write(path: Path) -> None:
        _iso_times(frame).to_csv(path, index=False, float_format="%.10g")

    return write


def parquet_writer(frame: pd.DataFrame | Callable[[], pd.DataFrame]) -> Writer:
    """Return a writer of ``frame`` as Parquet (a callable is asked for the frame then)."""

    def write(path: Path) -> None:
        (frame() if callable(frame) else frame).to_parquet(path, index=False)

    return write


def geoparquet_writer(frame: Any) -> Writer:
    """Return a writer of a GeoDataFrame as GeoParquet."""

    def write(path: Path) -> None:
        frame.to_parquet(path, index=False)

    return write


def geojson_writer(frame: Any) -> Writer:
    """Return a writer of a GeoDataFrame as GeoJSON, times as ISO 8601 text.

    Geometries are encoded by shapely (GEOS, exact round trip), attributes by the
    standard JSON encoder; no GDAL driver has to be loaded. Lon/lat data follow
    RFC 7946; data in another CRS name it in a ``crs`` member (the 2008 GeoJSON
    form that GIS programs read); planar data without a CRS have none.
    """
    import shapely

    def write(path: Path) -> None:
        attrs = _iso_times(pd.DataFrame(frame.drop(columns=frame.geometry.name)))
        records = attrs.astype(object).where(attrs.notna(), None).to_dict("records")
        shapes = shapely.to_geojson(np.asarray(frame.geometry.array), indent=None)
        head = '{"type": "FeatureCollection", '
        crs = frame.crs
        if crs is not None and not crs.equals("EPSG:4326"):
            authority = crs.to_authority()
            name = f"urn:ogc:def:crs:{authority[0]}::{authority[1]}" if authority else crs.to_wkt()
            head += '"crs": ' + json.dumps({"type": "name", "properties": {"name": name}}) + ", "
        features = ",\n".join(
            '{"type": "Feature", "properties": '
            + json.dumps(_plain(props), allow_nan=False)
            + ', "geometry": '
            + (shape if shape is not None else "null")
            + "}"
            for props, shape in zip(records, shapes, strict=True)
        )
        path.write_text(head + '"features": [\n' + features + "\n]}\n")

    return write


def _run_writers(jobs: list[tuple[Writer, Path]]) -> None:
    """Call every writer with its path, a few at a time in threads (each its own file).

    Parquet and CSV writing release the interpreter lock much of the time, so
    the files of a folder are written side by side. The first error is raised
    once every writer has stopped.
    """
    workers = min(len(jobs), os.cpu_count() or 1, 4)
    if workers <= 1:
        for write, target in jobs:
            write(target)
        return
    with ThreadPoolExecutor(max_workers=workers) as pool:
        for done in [pool.submit(write, target) for write, target in jobs]:
            done.result()


def write_folder(
    out_dir: str | os.PathLike[str],
    files: Mapping[str, Writer],
    force: bool = False,
    merge: str | None = None,
) -> Path:
    """Write ``files`` into ``out_dir`` atomically and return the folder's path.

    Parameters
    ----------
    out_dir : path
        The results folder. Its parent folders are created when missing.
    files : mapping of file name to writer
        Each writer is called with the full path to write.
    force : bool, default False
        Replace an existing ``out_dir`` (with ``merge``: replace files of the
        same name). Without it an existing folder is an error and nothing is
        written.
    merge : str, optional
        Add these files to an existing results folder of another command
        (named here, e.g. ``"groups"``): its files are kept, and ``run.json``
        and ``quality.json`` are combined as ``{"by_command": {...}}``. The
        folder is still replaced in one step.

    Returns
    -------
    Path
        ``out_dir``.

    Raises
    ------
    InputError
        When ``out_dir`` exists and ``force`` is false, or is not a folder.
    """
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise InputError(f"{out}: exists and is not a folder; choose another --out")
    merging = merge is not None and out.exists()
    if out.exists() and not force and not merging:
        raise InputError(
            f"{out}: already exists; choose another --out, add --force to replace it or "
            "--merge to add to it"
        )
    if merging and not force:
        shared = SHARED_JSON + SHARED_SAME
        clash = sorted(n for n in files if n not in shared and (out / n).exists())
        if clash:
            raise InputError(
                f"{out}: already holds {', '.join(clash)}; add --force to replace them"
            )
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.partial-", dir=out.parent))
    try:
        if merging:
            prior = _prior_command(out)
            for old_file in out.iterdir():
                if old_file.is_file() and (old_file.name not in files or
                                           old_file.name in SHARED_JSON):  # fmt: skip
                    shutil.copy2(old_file, tmp / old_file.name)
        jobs = []
        for name, write in files.items():
            target = tmp / name
            if merging and name in SHARED_JSON and target.exists() and hasattr(write, "content"):
                existing = json.loads(target.read_text())
                write = json_writer(_combined(existing, write.content, merge, prior))
            jobs.append((write, target))
        _run_writers(jobs)
        if out.exists():
            old = Path(tempfile.mkdtemp(prefix=f".{out.name}.old-", dir=out.parent))
            old.rmdir()
            out.rename(old)
            try:
                tmp.rename(out)
            except BaseException:
                old.rename(out)
                raise
            shutil.rmtree(old, ignore_errors=True)
        else:
            tmp.rename(out)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return out
