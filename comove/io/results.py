"""The results folder: written whole or not at all, read back, never a user's file lost.

This module alone knows the folder's format (see ``docs/results-folder.md``):

- **Writing.** :func:`claim` takes a folder for one run before anything is
  computed: it refuses a folder comove may not write, and holds a lock file
  (created exclusively, naming the run's process) so that two runs never write
  one folder at once. :func:`write_folder` writes the files within a claim (or
  claims the folder itself): a new folder is built in a hidden sibling and
  renamed into place; files added to an existing folder are staged in a hidden
  folder inside it and renamed into place, and the folder's record of what
  comove wrote there (:data:`MANIFEST`) is updated last.
- **Reading.** :class:`ResultsFolder` returns the run records and quality
  reports per command and the tables; :func:`run_records` reads a ``run.json``.
- **Records by command.** ``run.json`` and ``quality.json`` hold
  ``{"by_command": {command: content}}``, one command's or, merged, several.

A folder is comove's when it holds :data:`MANIFEST`; comove replaces or removes
only the files listed there, and never a folder holding anything else
(``--force``) or an input file of the run.
"""

from __future__ import annotations

import csv
import io
import json
import os
import re
import secrets
import shutil
import signal
import socket
import threading
import time
from collections.abc import Callable, Iterable, Iterator, Mapping
from concurrent.futures import ThreadPoolExecutor
from contextlib import contextmanager, suppress
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath
from typing import Any

import numpy as np
import pandas as pd

from comove.errors import InputError

Writer = Callable[[Path], None]

_ASSOCIATION = "co-location is association, not interaction or cause"

#: Printed by the commands and recorded in every run.json, by what was tracked
#: (``None``: not known).
CAUTIONS = {
    None: "Tracked positions can be personal data (of people, and of the drivers of "
    "vehicles) or sensitive (the sites of protected species); "
    + _ASSOCIATION
    + "; results are for analysis, not for real-time safety decisions.",
    "people": "Positions of tracked people are personal data: process them on a lawful "
    "basis, keep only what the analysis needs and pseudonymise ids; "
    + _ASSOCIATION
    + "; results are for analysis, not for real-time safety decisions.",
    "vehicles": "Positions of vehicles and vessels are personal data of their drivers and "
    "crews; " + _ASSOCIATION + "; results are for analysis, not for real-time safety or "
    "navigation decisions.",
    "animals": "Locations of tracked animals can reveal sensitive sites (dens, nests, "
    "roosts, refuges) of protected species: share them with care; "
    + _ASSOCIATION
    + "; results are for analysis, not for real-time management decisions.",
}
#: The caution when what was tracked is not known.
CAUTION = CAUTIONS[None]


def caution_for(subject: str | None) -> str:
    """Return the caution for what was tracked: people, vehicles, animals, or None."""
    return CAUTIONS.get(subject, CAUTION)


#: The folder's record of the files comove wrote into it, per command.
MANIFEST = ".comove-folder.json"
#: Version of the record's layout.
MANIFEST_FORMAT = 1
#: The command name under which the report's files are recorded.
REPORT = "report"
#: Files whose presence makes a folder a results folder of a command.
RESULT_FILES = ("patterns.csv", "episodes.csv", "focal.csv", "sweep.csv")
#: Files that two commands' results in one folder share, combined per command.
SHARED_JSON = ("run.json", "quality.json")
#: Files both commands write with the same content for one input: the newer is kept.
SHARED_SAME = ("track_sample.parquet",)

_LOCK = ".comove-lock"  # inside an existing folder; beside a new one: .<name>.comove-lock
_TAKEOVER = ".takeover"  # suffix of the lock's guard while a stale lock is removed
_NEW = ".comove-new-"  # a new folder being built beside: .<name>.comove-new-<pid>-<hex>
_STAGING = ".comove-staging-"  # files being staged inside: .comove-staging-<pid>-<hex>
_HOST = socket.gethostname()
_HELD_SIGNALS = (signal.SIGINT, signal.SIGTERM, signal.SIGHUP)


# ---------------------------------------------------------------- writers


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


def text_writer(text: str) -> Writer:
    """Return a writer of ``text`` as UTF-8."""

    def write(path: Path) -> None:
        path.write_text(text, encoding="utf-8")

    return write


def bytes_writer(data: bytes) -> Writer:
    """Return a writer of ``data`` as they are."""

    def write(path: Path) -> None:
        path.write_bytes(data)

    return write


def _iso_times(frame: pd.DataFrame) -> pd.DataFrame:
    """Return a copy of ``frame`` with its zone-aware time columns as ISO 8601 UTC text."""
    out = frame.copy()
    for col in out.columns:
        if isinstance(out[col].dtype, pd.DatetimeTZDtype):
            out[col] = _iso_text(out[col])
    return out


def _iso_text(times: pd.Series) -> pd.Series:
    """Return zone-aware times as ``%Y-%m-%dT%H:%M:%S.%fZ`` UTC text; missing stays missing.

    Each distinct time is formatted once, by numpy in C (pandas' ``strftime``
    goes value by value: 11 s for two million rows; times on a snapshot grid
    repeat); the text is the same.
    """
    naive = times.dt.tz_convert("UTC").dt.tz_localize(None).to_numpy(dtype="datetime64[us]")
    codes, distinct = pd.factorize(naive)  # NaT gets code -1
    text = np.datetime_as_string(np.asarray(distinct, dtype="datetime64[us]"), unit="us")
    shown = np.append(text.astype(object) + "Z", np.nan)  # position -1: missing
    return pd.Series(shown[codes], index=times.index, dtype=object)


#: How every CSV table writes a float: ten significant digits.
FLOAT_FORMAT = "%.10g"

#: Rows formatted at a time by :func:`csv_lines` (their fields are Python strings).
CSV_BLOCK = 20_000


def csv_writer(frame: pd.DataFrame) -> Writer:
    """Return a writer of ``frame`` as CSV, times as ISO 8601 UTC with ``Z``.

    The text is that of ``frame.to_csv(index=False, float_format=FLOAT_FORMAT)``,
    byte for byte (:func:`csv_lines`), written several times faster, once text
    cells that a spreadsheet would take for a formula are guarded
    (:func:`formula_guarded`).
    """

    def write(path: Path) -> None:
        with open(path, "w", encoding="utf-8", newline="") as handle:
            handle.writelines(csv_lines(formula_guarded(_iso_times(frame))))

    return write


#: First characters that make a spreadsheet read a cell as a formula (and the guard's own
#: apostrophe, so that reading back is exact).
_FORMULA_START = r"^[=+\-@\t\r']"


def formula_guarded(frame: pd.DataFrame) -> pd.DataFrame:
    """Return ``frame`` with text cells starting ``= + - @``, a tab or a CR behind an apostrophe.

    A spreadsheet opening a CSV would run such a cell as a formula (CSV
    injection): a role or object named ``=HYPERLINK(…)`` in someone's data must
    stay text. A cell already starting with an apostrophe gets one more, so
    that :meth:`ResultsFolder.table` restores every cell exactly by removing
    one. Parquet files keep the values as they are. Columns of numbers are
    never touched.
    """
    out = None
    for column in frame.columns:
        values = frame[column]
        if not (values.dtype == object or isinstance(values.dtype, pd.StringDtype)):
            continue
        text = values.astype("string")
        hit = text.str.contains(_FORMULA_START, regex=True).fillna(False).to_numpy(bool)
        if hit.any():
            out = frame.copy() if out is None else out
            guarded = values.astype(object).copy()
            guarded[hit] = "'" + text[hit].astype(object)
            out[column] = guarded
    return frame if out is None else out


def formula_unguarded(frame: pd.DataFrame) -> pd.DataFrame:
    """Return a CSV table read back with the apostrophe of :func:`formula_guarded` removed."""
    for column in frame.columns:
        values = frame[column]
        if values.dtype == object or isinstance(values.dtype, pd.StringDtype):
            text = values.astype("string")
            hit = text.str.startswith("'").fillna(False).to_numpy(bool)
            if hit.any():
                restored = values.astype(object).copy()
                restored[hit] = text[hit].str.slice(1).astype(object)
                frame[column] = restored
    return frame


def csv_lines(frame: pd.DataFrame) -> Iterator[str]:
    """Yield the text of ``frame.to_csv(index=False, float_format=FLOAT_FORMAT)`` in blocks.

    The same bytes but for text holding a carriage return, which is quoted here
    (see :func:`_quoted`); a frame that pandas writes itself (below) keeps
    pandas' quoting.

    Columns of floats, integers, booleans and text are formatted here, a
    column at a time (pandas' writer formats value by value in Python, 2.4 s
    for the 232 000 rows of a fleet day's dyads). Text is quoted as the
    ``csv`` module quotes it (minimal quoting, ``"`` doubled). A frame of one
    column, or with columns of any other kind, is written by pandas itself.
    """
    ours = frame.shape[1] > 1 and not frame.columns.has_duplicates
    kinds = [_column_kind(frame[c]) for c in frame.columns] if ours else [None]
    if None in kinds:
        yield frame.to_csv(index=False, float_format=FLOAT_FORMAT, lineterminator="\n")
        return
    yield ",".join(_quoted([str(c) for c in frame.columns])) + "\n"
    for lo in range(0, len(frame), CSV_BLOCK):  # a block at a time: memory bounded by a block
        texts = [_column_text(frame[c].iloc[lo : lo + CSV_BLOCK], kind)
                 for c, kind in zip(frame.columns, kinds, strict=True)]  # fmt: skip
        yield "".join([",".join(row) + "\n" for row in zip(*texts, strict=True)])


def _column_kind(column: pd.Series) -> str | None:
    """Return how :func:`_column_text` writes a column, or None for a kind pandas must write."""
    dtype = column.dtype
    if dtype == np.float64:
        return "float"
    if dtype == np.bool_:
        return "bool"
    if isinstance(dtype, np.dtype) and dtype.kind in "iu":
        return "int"
    if (isinstance(dtype, np.dtype) and dtype.kind == "O") or isinstance(dtype, pd.StringDtype):
        values = column.to_numpy(dtype=object, na_value="")
        return (
            "text"
            if pd.api.types.infer_dtype(values, skipna=False) in ("string", "empty")
            else None
        )
    return None


def _column_text(column: pd.Series, kind: str) -> list[str]:
    """Return a column's values as CSV fields (``kind`` from :func:`_column_kind`)."""
    if kind == "float":
        fmt = FLOAT_FORMAT
        return ["" if v != v else fmt % v for v in column.to_numpy().tolist()]
    if kind == "bool":
        return ["True" if v else "False" for v in column.to_numpy().tolist()]
    if kind == "int":
        return list(map(str, column.to_numpy().tolist()))
    values = column.to_numpy(dtype=object, na_value="").tolist()
    if not _NEEDS_QUOTES.search("\x1f".join(values)):  # the usual case: nothing to quote
        return values
    return _quoted(values)


_NEEDS_QUOTES = re.compile(r'[,"\r\n]')


def _quoted(values: list[str]) -> list[str]:
    """Return text fields quoted as the ``csv`` module quotes them (``QUOTE_MINIMAL``).

    A field holding a carriage return is quoted too (the ``csv`` module, and so
    pandas, leaves it bare when lines end with a line feed, and a reader then
    splits the row there).
    """
    out = list(values)
    for i, v in enumerate(values):
        if _NEEDS_QUOTES.search(v):
            buffer = io.StringIO()
            csv.writer(buffer, lineterminator="\r\n").writerow([v])
            out[i] = buffer.getvalue()[:-2]
    return out


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


#: Characters XML 1.0 cannot hold (controls other than tab, line feed and carriage
#: return, lone surrogates, U+FFFE and U+FFFF): written as ``<U+XXXX>`` text instead.
_NOT_XML = re.compile("[\x00-\x08\x0b\x0c\x0e-\x1f\ud800-\udfff\ufffe\uffff]")

#: Any character that XML text or an attribute value cannot hold as it is.
_XML_SPECIAL = re.compile('[&<>"' + _NOT_XML.pattern[1:])

#: Rows of a GraphML file built as text at once; bounds the writer's memory.
GRAPHML_BLOCK = 50_000


def _xml_text(values: pd.Series) -> pd.Series:
    """Return text values escaped for XML content and attributes (missing stays missing).

    Most ids and names hold nothing to escape: the text is searched once, and
    only a column that holds such a character is rewritten.
    """
    present = values.notna()
    text = values.astype(str)
    # searched with Python's re, which takes any code point (Arrow's refuses surrogates)
    if any(_XML_SPECIAL.search(str(v)) for v in values[present].tolist()):
        text = (
            text.str.replace(_NOT_XML, lambda m: f"<U+{ord(m.group()):04X}>", regex=True)
            .str.replace("&", "&amp;", regex=False)
            .str.replace("<", "&lt;", regex=False)
            .str.replace(">", "&gt;", regex=False)
            .str.replace('"', "&quot;", regex=False)
        )
    return text.where(present)


def _graphml_type(values: pd.Series) -> str:
    """Return the GraphML ``attr.type`` of a column."""
    if pd.api.types.is_bool_dtype(values):
        return "boolean"
    if pd.api.types.is_integer_dtype(values):
        return "long"
    if pd.api.types.is_float_dtype(values):
        return "double"
    return "string"


def _graphml_values(values: pd.Series, kind: str) -> pd.Series:
    """Return a column's values as GraphML text (None where a string is missing)."""
    if kind == "boolean":
        return values.map({True: "true", False: "false"})
    if kind in ("double", "long"):
        # Arrow's cast, outside the interpreter lock: floats as the shortest text that
        # reads back exactly (NaN written nan), missing integers missing
        import pyarrow as pa

        array = pa.array(values.to_numpy(dtype="float64") if kind == "double" else values,
                         from_pandas=kind == "long")  # fmt: skip
        return pd.Series(
            array.cast(pa.string()), index=values.index, dtype=pd.ArrowDtype(pa.string())
        )
    if isinstance(values.dtype, pd.DatetimeTZDtype):
        return _iso_text(values)  # digits, '-', ':', '.', 'T' and 'Z': nothing to escape
    return _xml_text(values)


def _graphml_elements(
    frame: pd.DataFrame, keys: dict[str, tuple[str, str]], head: pd.Series, tag: str
) -> pd.Series:
    """Return one ``<tag ...>...</tag>`` line per row: ``head`` opens it, then the data."""
    line = head.astype(object)
    for column, (key, kind) in keys.items():
        text = _graphml_values(frame[column], kind)
        cell = f'<data key="{key}">' + text + "</data>"
        line = line + cell.where(text.notna(), "")  # a missing value is left out
    return line + f"</{tag}>\n"


def graphml_writer(
    nodes: pd.DataFrame, node_id: str, edges: pd.DataFrame, source: str, target: str
) -> Writer:
    """Return a writer of an undirected graph as GraphML: every other column an attribute.

    Parameters
    ----------
    nodes : DataFrame
        One row per node; the other columns are its data.
    node_id : str
        The column of ``nodes`` that names each node.
    edges : DataFrame
        One row per edge; the other columns are its data.
    source, target : str
        The columns of ``edges`` naming the nodes each edge joins.

    Notes
    -----
    Written as text, column by column over blocks of ``GRAPHML_BLOCK`` rows,
    so that memory stays that of a block: a graph library's writer holds every
    node and edge as objects first (measured with networkx: 200,000 edges of 20
    attributes, 47 s and 2.9 GB). Booleans, integers, floats (the shortest text
    that reads back exactly; NaN as ``nan``) and text get the GraphML types
    ``boolean``, ``long``, ``double`` and ``string``; times are ISO 8601 UTC
    text; a missing text value is left out. Characters XML cannot hold are
    written as ``<U+XXXX>``.

    References
    ----------
    .. [1] U. Brandes, M. Eiglsperger, J. Lerner, C. Pich, "Graph markup language
       (GraphML)", in R. Tamassia (ed.), Handbook of Graph Drawing and
       Visualization, CRC Press, 2013, chapter 16. (from memory, not checked)
    """
    node_data = [c for c in nodes.columns if c != node_id]
    edge_data = [c for c in edges.columns if c not in (source, target)]
    node_keys = {c: (f"n{k}", _graphml_type(nodes[c])) for k, c in enumerate(node_data)}
    edge_keys = {c: (f"e{k}", _graphml_type(edges[c])) for k, c in enumerate(edge_data)}

    def declarations() -> str:
        lines = [
            "<?xml version='1.0' encoding='utf-8'?>\n",
            '<graphml xmlns="http://graphml.graphdrawing.org/xmlns" '
            'xmlns:xsi="http://www.w3.org/2001/XMLSchema-instance" '
            'xsi:schemaLocation="http://graphml.graphdrawing.org/xmlns '
            'http://graphml.graphdrawing.org/xmlns/1.0/graphml.xsd">\n',
        ]
        for where, keys in (("node", node_keys), ("edge", edge_keys)):
            for column, (key, kind) in keys.items():
                name = _xml_text(pd.Series([column])).iloc[0]
                lines.append(f'<key id="{key}" for="{where}" attr.name="{name}" '
                             f'attr.type="{kind}"/>\n')  # fmt: skip
        return "".join(lines) + '<graph edgedefault="undirected">\n'

    def write(path: Path) -> None:
        with open(path, "w", encoding="utf-8", newline="\n") as handle:
            handle.write(declarations())
            for lo in range(0, len(nodes), GRAPHML_BLOCK):
                part = nodes.iloc[lo : lo + GRAPHML_BLOCK]
                head = '<node id="' + _xml_text(part[node_id]) + '">'
                handle.writelines(_graphml_elements(part, node_keys, head, "node"))
            for lo in range(0, len(edges), GRAPHML_BLOCK):
                part = edges.iloc[lo : lo + GRAPHML_BLOCK]
                head = ('<edge source="' + _xml_text(part[source]) + '" target="'
                        + _xml_text(part[target]) + '">')  # fmt: skip
                handle.writelines(_graphml_elements(part, edge_keys, head, "edge"))
            handle.write("</graph>\n</graphml>\n")

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


# ---------------------------------------------------------------- merging by command


def by_command(content: Mapping[str, Any]) -> dict[str, dict]:
    """Return run or quality content keyed by command.

    Folders hold ``{"by_command": {command: record}}``; those of earlier
    versions written by one command hold that command's record itself.
    """
    if "by_command" in content and isinstance(content["by_command"], dict):
        return {str(k): v for k, v in content["by_command"].items() if isinstance(v, dict)}
    if not content:
        return {}
    return {str(content.get("command", "run")): dict(content)}


#: The name of the rows over every period or every area (``--periods``, ``--areas``).
ALL_PARTS = "all"


def overall(table: Any) -> Any:
    """Return the rows of a table split by period and area that are over everything.

    The ``period`` and ``area`` columns are dropped; a table that is not split
    (or None) is returned as it is.
    """
    if table is None or "period" not in table.columns:
        return table
    rows = ((table["period"] == ALL_PARTS) & (table["area"] == ALL_PARTS)).to_numpy()
    return table[rows].drop(columns=["period", "area"]).reset_index(drop=True)


def flat_settings(run: dict[str, Any]) -> dict[str, Any]:
    """Return a run record's settings by option name, whichever layout it was written in.

    Records of earlier versions keep the settings per stage
    (``{"ColocationParams": {"radius": 2.0}, ...}``); today's list them by
    option name (``{"radius": 2.0, ...}``).
    """
    settings = run.get("settings") or {}
    if settings and all(isinstance(v, dict) for v in settings.values()):
        return {k: v for values in settings.values() for k, v in values.items()}
    return dict(settings)


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
    if isinstance(run.get("by_command"), dict) and len(run["by_command"]) == 1:
        return str(next(iter(run["by_command"])))
    return str(run.get("command", "earlier"))


# ---------------------------------------------------------------- reading


def _read_json(path: Path, advice: str) -> dict:
    """Return a JSON file's object, or an empty dict when the file is absent."""
    if not path.is_file():
        return {}
    try:
        content = json.loads(path.read_text())
    except (OSError, ValueError) as exc:
        reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise InputError(f"{path}: cannot be read as JSON ({reason}); {advice}") from None
    return content if isinstance(content, dict) else {}


def run_records(path: str | os.PathLike[str]) -> dict[str, dict]:
    """Return the run records of a ``run.json`` (or of a results folder), keyed by command.

    Raises
    ------
    InputError
        When the file cannot be read as JSON.
    """
    p = Path(path)
    if p.is_dir():
        p = p / "run.json"
    return by_command(_read_json(p, "give a run.json written by comove"))


#: Per table, the former names of renamed columns and their names now, so that the
#: report still reads folders written before the renaming.
FORMER_COLUMNS: dict[str, dict[str, str]] = {
    "patterns.csv": {"prevalent_seconds": "prevalent_s", "longest_run_seconds": "longest_run_s"},
    "sweep.csv": {"radius": "radius_m", "prevalent_seconds": "prevalent_s",
                  "longest_run_seconds": "longest_run_s"},
    "dyads.csv": {"together_seconds": "together_s",
                  "longest_together_seconds": "longest_together_s"},
    "episode_roles.csv": {"total_seconds": "total_s", "longest_seconds": "longest_s"},
    "cross_k.csv": {"k": "k_m2", "l": "l_m", "l_minus_r": "l_minus_r_m", "null_low": "null_low_m",
                    "null_high": "null_high_m", "null_mean": "null_mean_m"},
}  # fmt: skip


class ResultsFolder:
    """Read access to a results folder; every absent file reads as None (or empty).

    Parameters
    ----------
    folder : path
        The folder. See :func:`open_results` for one that must hold results.
    """

    def __init__(self, folder: str | os.PathLike[str]) -> None:
        self.path = Path(folder)

    def has(self, name: str) -> bool:
        """Return whether the folder holds the file ``name``."""
        return (self.path / name).is_file()

    def runs(self) -> dict[str, dict]:
        """Return the run records (``run.json``) keyed by command."""
        return by_command(_read_json(self.path / "run.json", "rerun the command"))

    def quality(self) -> dict[str, dict]:
        """Return the data-quality reports (``quality.json``) keyed by command."""
        return by_command(_read_json(self.path / "quality.json", "rerun the command"))

    def table(self, name: str) -> pd.DataFrame | None:
        """Return the CSV table ``name``, or None when absent.

        Columns of folders written before a column was renamed are read under
        their current names (``FORMER_COLUMNS``).
        """
        path = self.path / name
        if not path.is_file():
            return None
        try:
            table = formula_unguarded(pd.read_csv(path, keep_default_na=True))
            return table.rename(columns=FORMER_COLUMNS.get(name, {}))
        except (OSError, ValueError) as exc:
            raise InputError(f"{path}: cannot be read as CSV ({_first_line(exc)}); "
                             "rerun the command") from None  # fmt: skip

    def parquet(self, name: str, **kwargs: Any) -> pd.DataFrame | None:
        """Return the Parquet table ``name`` (``kwargs`` to pandas), or None when absent."""
        path = self.path / name
        if not path.is_file():
            return None
        try:
            return pd.read_parquet(path, **kwargs)
        except (OSError, ValueError) as exc:
            raise InputError(f"{path}: cannot be read as Parquet ({_first_line(exc)}); "
                             "rerun the command") from None  # fmt: skip

    def geoparquet(self, name: str) -> Any:
        """Return the GeoParquet table ``name`` as a GeoDataFrame, or None when absent."""
        path = self.path / name
        if not path.is_file():
            return None
        import geopandas as gpd

        try:
            return gpd.read_parquet(path)
        except (OSError, ValueError) as exc:
            raise InputError(f"{path}: cannot be read as GeoParquet ({_first_line(exc)}); "
                             "rerun the command") from None  # fmt: skip


def _first_line(exc: BaseException) -> str:
    return str(exc).splitlines()[0] if str(exc) else type(exc).__name__


def open_results(folder: str | os.PathLike[str]) -> ResultsFolder:
    """Return a results folder of ``comove mine``, ``groups`` (or both) or ``sweep`` for reading.

    Raises
    ------
    InputError
        When ``folder`` does not exist or holds none of ``patterns.csv``,
        ``episodes.csv`` and ``sweep.csv``, or when an earlier run was cut off
        while writing it.
    """
    path = Path(folder)
    if not path.is_dir() or not any((path / name).is_file() for name in RESULT_FILES):
        raise InputError(
            f"{path}: no comove results found (patterns.csv, episodes.csv, focal.csv or "
            "sweep.csv); run comove mine, groups, focal or sweep first"
        )
    record = read_manifest(path)
    if record is not None and not record.complete:
        raise InputError(f"{path}: an earlier comove run was cut off while writing it; "
                         "rerun that command with --force")  # fmt: skip
    return ResultsFolder(path)


# ---------------------------------------------------------------- the folder's record


@dataclass
class Manifest:
    """What comove wrote into a results folder: relative file paths per command."""

    files: dict[str, list[str]] = field(default_factory=dict)
    complete: bool = True

    def listed(self) -> set[str]:
        """Return every file comove wrote, whichever command."""
        return {name for names in self.files.values() for name in names}

    def text(self) -> str:
        """Return the record as JSON text."""
        files = {c: sorted(set(names)) for c, names in sorted(self.files.items()) if names}
        content = {"comove_results_folder": MANIFEST_FORMAT, "complete": self.complete,
                   "files": files}  # fmt: skip
        return json.dumps(content, indent=2) + "\n"


def _safe_name(name: object) -> bool:
    """Return whether ``name`` is a plain relative path inside a folder."""
    if not isinstance(name, str) or not name or "\\" in name:
        return False
    parts = PurePosixPath(name).parts
    return (
        not name.startswith("/")
        and all(p not in ("", ".", "..") for p in parts)
        and (parts[0] != MANIFEST and not parts[0].startswith((_STAGING, _LOCK)))
    )


def read_manifest(folder: str | os.PathLike[str]) -> Manifest | None:
    """Return the record of what comove wrote into ``folder``, or None when it has none.

    Raises
    ------
    InputError
        When the record cannot be read or names a path outside the folder.
    """
    path = Path(folder) / MANIFEST
    if not path.is_file():
        return None
    try:
        raw = json.loads(path.read_text())
        files = {str(c): list(names) for c, names in raw["files"].items()}
    except (OSError, ValueError, KeyError, TypeError, AttributeError):
        files = None
    if files is None or not all(_safe_name(n) for names in files.values() for n in names):
        raise InputError(f"{path}: comove's record of this folder is damaged; remove the "
                         "folder yourself or choose another --out")  # fmt: skip
    return Manifest(files, bool(raw.get("complete", True)))


# ---------------------------------------------------------------- processes and the lock


def _alive(pid: int) -> bool:
    """Return whether process ``pid`` of this host is running (a zombie is not)."""
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except (ProcessLookupError, OverflowError):
        return False
    except PermissionError:  # another user's process
        return True
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except (OSError, IndexError):
        return True
    return state not in ("Z", "X")


def _owner(path: Path) -> dict | None:
    """Return the run named in a lock file: {} when the file is gone, None when unreadable."""
    try:
        raw = json.loads(path.read_text())
    except FileNotFoundError:
        return {}
    except (OSError, ValueError):
        return None
    return raw if isinstance(raw, dict) and isinstance(raw.get("pid"), int) else None


def _stale(owner: dict) -> bool:
    """Return whether the run named in a lock file has ended (known only on this host)."""
    return owner.get("host") == _HOST and not _alive(owner["pid"])


def _settled_owner(path: Path) -> dict | None:
    """Return the run named in a lock file, waiting a moment for one being written."""
    for _ in range(10):
        owner = _owner(path)
        if owner is not None:
            return owner
        time.sleep(0.05)
    return None


def _create(path: Path, content: str) -> bool:
    """Create ``path`` holding ``content`` if it does not exist yet; return whether it did."""
    try:
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o644)
    except FileExistsError:
        return False
    with os.fdopen(fd, "w") as fh:
        fh.write(content)
    return True


def _owner_text(token: str) -> str:
    return json.dumps({"pid": os.getpid(), "host": _HOST, "token": token,
                       "since": time.strftime("%Y-%m-%dT%H:%M:%S%z")}) + "\n"  # fmt: skip


def _take_lock(lock: Path, shown: Path) -> str:
    """Create the lock file ``lock`` for this process and return its token.

    A lock naming a process of this host that has ended is removed first; a
    lock of a running process (or of another host) is an InputError naming it.
    """
    token = secrets.token_hex(8)
    for _ in range(20):
        if _create(lock, _owner_text(token)):
            return token
        owner = _settled_owner(lock)
        if owner == {}:  # released meanwhile
            continue
        if owner is None:
            raise InputError(f"{shown}: another comove run may be writing it ({lock} names no "
                             f"run); if none is running, delete {lock}")  # fmt: skip
        if not _stale(owner):
            where = "" if owner.get("host") == _HOST else f" on {owner.get('host')}"
            raise InputError(f"{shown}: another comove run (PID {owner['pid']}{where}) is "
                             "writing it; wait for it to end or choose another --out "
                             f"(its lock: {lock})")  # fmt: skip
        _remove_stale_lock(lock, owner)
    raise InputError(f"{shown}: other comove runs keep taking it; try again")


def _remove_stale_lock(lock: Path, owner: dict) -> None:
    """Remove a lock whose run has ended, unless another run replaced it meanwhile.

    Runs that find the same stale lock take turns through a guard file, and each
    removes the lock only if it still names the ended run.
    """
    guard = lock.with_name(lock.name + _TAKEOVER)
    if not _create(guard, _owner_text("takeover")):
        taker = _owner(guard)
        if taker == {}:
            return
        aged = taker is None and time.time() - _mtime(guard) > 10
        if aged or (taker and _stale(taker)):
            guard.unlink(missing_ok=True)
        else:
            time.sleep(0.05)
        return
    try:
        if _owner(lock) == owner:
            lock.unlink(missing_ok=True)
    finally:
        guard.unlink(missing_ok=True)


def _mtime(path: Path) -> float:
    try:
        return path.stat().st_mtime
    except OSError:
        return time.time()


@contextmanager
def _signals_held() -> Iterator[None]:
    """Hold SIGINT, SIGTERM and SIGHUP during a short step; deliver them after it.

    The signals are blocked in this thread (``pthread_sigmask``), and one that
    reaches another thread is recorded instead of interrupting the step. Off
    the main thread, Python's handlers never interrupt the step anyway.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    caught: list[int] = []
    old_mask = signal.pthread_sigmask(signal.SIG_BLOCK, _HELD_SIGNALS)
    old = {s: signal.signal(s, lambda n, _frame: caught.append(n)) for s in _HELD_SIGNALS}
    try:
        yield
    finally:
        pending = signal.sigpending()
        for s, handler in old.items():
            signal.signal(s, signal.SIG_DFL if handler is None else handler)
        signal.pthread_sigmask(signal.SIG_SETMASK, old_mask)
        for n in dict.fromkeys(caught):
            if n not in pending:
                signal.raise_signal(n)


# ---------------------------------------------------------------- claiming and writing


def _some(names: list[str]) -> str:
    """Return the first names of a list, and how many more there are."""
    shown = ", ".join(names[:3])
    return shown + (f" and {len(names) - 3} more" if len(names) > 3 else "")


def _ours(name: str) -> bool:
    """Return whether a top-level entry of a folder is comove's bookkeeping."""
    return name == MANIFEST or name.startswith((_STAGING, _LOCK))


def _foreign(folder: Path, listed: set[str]) -> list[str]:
    """Return what ``folder`` holds that is not listed (folders end with ``/``)."""
    needed = {str(p) for name in listed for p in PurePosixPath(name).parents if str(p) != "."}
    found: list[str] = []
    todo = [""]
    while todo:
        prefix = todo.pop()
        with os.scandir(folder / prefix if prefix else folder) as entries:
            for entry in entries:
                rel = prefix + entry.name
                if not prefix and _ours(entry.name):
                    continue
                if entry.is_dir(follow_symlinks=False):
                    if rel in needed:
                        todo.append(rel + "/")
                    else:
                        found.append(rel + "/")
                elif rel not in listed:
                    found.append(rel)
    return sorted(found)


def _pid_of(name: str, prefix: str) -> int | None:
    """Return the process id in a staging folder's name, or None."""
    head = name[len(prefix) :].split("-", 1)[0]
    return int(head) if name.startswith(prefix) and head.isdigit() else None


def _preserve(path: Path, copy: Path) -> None:
    """Keep the current file ``path`` as ``copy`` (a hard link, else a copy)."""
    copy.parent.mkdir(parents=True, exist_ok=True)
    try:
        os.link(path, copy, follow_symlinks=False)
    except OSError:
        shutil.copy2(path, copy, follow_symlinks=False)


class Claim:
    """The right to write one results folder, held by one run (see :func:`claim`)."""

    def __init__(
        self,
        out: str | os.PathLike[str],
        command: str,
        force: bool,
        merge: bool,
        inputs: Iterable[str | os.PathLike[str]],
        owned: Iterable[str],
    ) -> None:
        self.target = Path(out)
        self.path = Path(os.path.abspath(out))
        if not self.path.name:
            raise InputError(f"{out}: cannot be a results folder; choose another --out")
        self.command, self.force, self.merge = command, force, merge
        self.inputs = tuple(Path(os.path.realpath(p)) for p in inputs)
        self.owned = frozenset(owned)
        #: Whether this claim's files are in place.
        self.committed = False
        #: Whether writing removed a report that described the folder's earlier results.
        self.report_removed = False
        self._lock: Path | None = None
        self._token = ""
        self._made: list[Path] = []
        self._staging: list[Path] = []

    # -- checks

    def check(self) -> Manifest | None:
        """Refuse a folder this run may not write; return its record (None: new or unmarked).

        Raises
        ------
        InputError
            When the target is a file; exists without ``force`` or ``merge``;
            holds an input of the run that could be replaced; has no record
            but holds something; holds files comove did not write (``force``
            without ``merge``); already holds this command's results (``merge``
            without ``force``); or was left incomplete (without ``force``).
        """
        out = self.target
        if not os.path.lexists(self.path):
            return None
        if not self.path.is_dir():
            raise InputError(f"{out}: exists and is not a folder; choose another --out")
        record = read_manifest(self.path)
        if self.command == REPORT:
            return record
        if not (self.force or self.merge):
            raise InputError(f"{out}: already exists; choose another --out, add --force to "
                             "replace it or --merge to add to it")  # fmt: skip
        self._refuse_inputs(record)
        foreign = _foreign(self.path, record.listed() if record else set())
        if record is None:
            if foreign:
                raise InputError(
                    f"{out}: holds files but no record of what comove wrote there (an older "
                    "comove's folder, or not comove's), so it is left untouched; remove it "
                    "yourself or choose another --out"
                )
            return None
        if not record.complete and not self.force:
            raise InputError(f"{out}: an earlier comove run was cut off while writing it; add "
                             "--force to replace its files")  # fmt: skip
        if self.force and not self.merge and foreign:
            raise InputError(f"{out}: holds {_some(foreign)}, which comove did not write, so "
                             "--force will not replace it; move them out or choose another "
                             "--out")  # fmt: skip
        mine = sorted(record.files.get(self.command, []))
        if self.merge and not self.force and mine:
            raise InputError(f"{out}: already holds {self.command} results ({_some(mine)}); "
                             "add --force to replace them")  # fmt: skip
        return record

    def _refuse_inputs(self, record: Manifest | None) -> None:
        """Refuse a folder holding an input of the run that this write could replace."""
        root = Path(os.path.realpath(self.path))
        listed = record.listed() if record else set()
        for source in self.inputs:
            try:
                rel = source.relative_to(root).as_posix()
            except ValueError:
                continue
            if (self.force and not self.merge) or rel in listed:
                raise InputError(f"{self.target}: holds {rel}, an input of this run, which "
                                 "comove never replaces; choose another --out")  # fmt: skip

    # -- the lock and leftovers

    def lock(self) -> None:
        """Take the folder's lock (inside it when it exists, else beside it)."""
        if self.path.is_dir():
            lock = self.path / _LOCK
        else:
            missing = [p for p in (self.path.parent, *self.path.parent.parents) if not p.exists()]
            for folder in reversed(missing):
                folder.mkdir(exist_ok=True)
                self._made.append(folder)
            lock = self.path.parent / f".{self.path.name}{_LOCK}"
        self._token = _take_lock(lock, self.target)
        self._lock = lock

    def clear_leftovers(self) -> None:
        """Remove the staging folders of comove runs that ended without cleaning up."""
        places = [(self.path.parent, f".{self.path.name}{_NEW}")]
        if self.path.is_dir():
            places.append((self.path, _STAGING))
        for where, prefix in places:
            stale: list[str] = []
            with suppress(OSError), os.scandir(where) as entries:
                for entry in entries:
                    pid = _pid_of(entry.name, prefix)
                    if pid is not None and entry.is_dir(follow_symlinks=False) and not _alive(pid):
                        stale.append(entry.path)
            for path in stale:
                shutil.rmtree(path, ignore_errors=True)

    def release(self) -> None:
        """Remove this run's staging folders and lock, and parents made for nothing."""
        with _signals_held():
            for staging in self._staging:
                shutil.rmtree(staging, ignore_errors=True)
            if self._lock is not None and (_owner(self._lock) or {}).get("token") == self._token:
                self._lock.unlink(missing_ok=True)
            if not self.committed:
                for folder in reversed(self._made):
                    with suppress(OSError):
                        folder.rmdir()

    def _new_staging(self, where: Path, prefix: str) -> Path:
        """Create and return a hidden staging folder named after this process."""
        while True:
            path = where / f"{prefix}{os.getpid()}-{secrets.token_hex(4)}"
            try:
                os.mkdir(path, 0o777)
            except FileExistsError:
                continue
            self._staging.append(path)
            return path

    # -- writing

    def commit(self, files: Mapping[str, Writer]) -> Path:
        """Write ``files`` (relative name -> writer) into the folder in one step.

        Returns
        -------
        Path
            The folder, as given.
        """
        record = self.check()
        if not os.path.lexists(self.path):
            self._write_new(files)
        else:
            self._write_into(files, record)
        return self.target

    def _write_new(self, files: Mapping[str, Writer]) -> None:
        """Build the folder in a hidden sibling and rename it into place."""
        staging = self._new_staging(self.path.parent, f".{self.path.name}{_NEW}")
        jobs = []
        for name, write in files.items():
            (staging / name).parent.mkdir(parents=True, exist_ok=True)
            jobs.append((self._merged(name, write, Manifest({})), staging / name))
        _run_writers(jobs)
        (staging / MANIFEST).write_text(Manifest({self.command: list(files)}).text())
        with _signals_held():
            if os.path.lexists(self.path):
                raise InputError(f"{self.target}: appeared while this run was computing; "
                                 "choose another --out")  # fmt: skip
            os.rename(staging, self.path)
            self._staging.remove(staging)
            self.committed = True

    def _write_into(self, files: Mapping[str, Writer], record: Manifest | None) -> None:
        """Stage the files inside the folder, then move them into place."""
        unmarked = record is None
        old = record or Manifest()
        listed = old.listed() | (self.owned if unmarked else set())
        names = list(files)
        in_the_way = [n for n in names if os.path.lexists(self.path / n) and n not in listed]
        if in_the_way:
            raise InputError(f"{self.target}: holds {_some(in_the_way)}, which comove did not "
                             "write; move it away or choose another --out")  # fmt: skip
        new = self._next_record(old, names)
        obsolete = sorted(n for n in listed - new.listed() if os.path.lexists(self.path / n))
        self.report_removed = self.command != REPORT and bool(old.files.get(REPORT))
        staging = self._new_staging(self.path, _STAGING)
        jobs = []
        for name, write in files.items():
            (staging / name).parent.mkdir(parents=True, exist_ok=True)
            jobs.append((self._merged(name, write, old), staging / name))
        _run_writers(jobs)
        interim = None  # the report in an older comove's folder leaves it without a record
        if not (unmarked and self.command == REPORT):
            both = {*old.files, *new.files}
            interim = Manifest({c: [*old.files.get(c, []), *new.files.get(c, [])] for c in both},
                               complete=False)  # fmt: skip
        if interim is not None:
            (staging / MANIFEST).write_text(new.text())
        self._swap_in(staging, names, obsolete, interim)

    def _next_record(self, old: Manifest, names: list[str]) -> Manifest:
        """Return the folder's record once ``names`` are written by this command."""
        if self.command == REPORT:
            return Manifest({**old.files, REPORT: names})
        if self.merge:
            kept = {c: n for c, n in old.files.items() if c not in (REPORT, self.command)}
            return Manifest({**kept, self.command: names})
        return Manifest({self.command: names})

    def _merged(self, name: str, write: Writer, old: Manifest) -> Writer:
        """Return the writer of ``name``: a run or quality record keyed by its command.

        ``run.json`` and ``quality.json`` have one layout, ``{"by_command":
        {command: record}}``, in a folder of one command as in one of several;
        with ``--merge`` the folder's records of other commands are kept.
        """
        current = self.path / name
        content = getattr(write, "content", None)
        if name not in SHARED_JSON or not isinstance(content, dict) or "by_command" in content:
            return write
        if self.merge and name in old.listed() and current.is_file():
            existing = _read_json(current, "rerun the command that wrote it with --force")
            prior = _prior_command(self.path)
            return json_writer(_combined(existing, content, self.command, prior))
        return json_writer({"by_command": {self.command: content}})

    def _swap_in(
        self, staging: Path, names: list[str], obsolete: list[str], interim: Manifest | None
    ) -> None:
        """Move staged files into place, remove obsolete ones and record the folder last.

        The folder's current files are kept (hard links) until the step is
        done: a failure restores them. An interim record (marked incomplete)
        lists the old and new files while they change places, so a run killed
        in between leaves a folder that ``--force`` can still replace.
        """
        out, previous = self.path, staging / ".previous"
        touched = [*names, *obsolete] + ([MANIFEST] if interim is not None else [])
        existed = {rel for rel in touched if os.path.lexists(out / rel)}
        for rel in sorted(existed):
            _preserve(out / rel, previous / rel)
        undo: list[Callable[[], None]] = []

        def put_back(rel: str) -> Callable[[], None]:
            def restore() -> None:
                if rel in existed:
                    (out / rel).parent.mkdir(parents=True, exist_ok=True)
                    os.replace(previous / rel, out / rel)
                else:
                    (out / rel).unlink(missing_ok=True)

            return restore

        with _signals_held():
            try:
                if interim is not None:
                    (staging / ".interim").write_text(interim.text())
                    os.replace(staging / ".interim", out / MANIFEST)
                    undo.append(put_back(MANIFEST))
                for rel in names:
                    for made in _missing_parents(out, rel):
                        made.mkdir()
                        undo.append(made.rmdir)
                    undo.append(put_back(rel))
                    os.replace(staging / rel, out / rel)
                for rel in obsolete:
                    undo.append(put_back(rel))
                    os.unlink(out / rel)
                _prune(out, obsolete)
                if interim is not None:
                    os.replace(staging / MANIFEST, out / MANIFEST)
                self.committed = True
            except BaseException:
                for step in reversed(undo):
                    with suppress(OSError):
                        step()
                raise


def _missing_parents(folder: Path, rel: str) -> list[Path]:
    """Return the missing subfolders of ``folder`` on the way to ``rel``, outermost first."""
    parents = [folder / p for p in reversed(PurePosixPath(rel).parents) if str(p) != "."]
    return [p for p in parents if not p.is_dir()]


def _prune(folder: Path, removed: list[str]) -> None:
    """Remove the subfolders of ``folder`` that removing files left empty."""
    parents = {p for rel in removed for p in PurePosixPath(rel).parents if str(p) != "."}
    for rel in sorted(parents, key=lambda p: -len(p.parts)):
        with suppress(OSError):
            (folder / rel).rmdir()


_ACTIVE: dict[str, Claim] = {}
_ACTIVE_GUARD = threading.Lock()


@contextmanager
def claim(
    out: str | os.PathLike[str],
    *,
    command: str = "results",
    force: bool = False,
    merge: bool = False,
    inputs: Iterable[str | os.PathLike[str]] = (),
    owned: Iterable[str] = (),
) -> Iterator[Claim]:
    """Hold the results folder ``out`` for one run: checked, locked, and cleaned up after.

    Take it before computing anything, so that a folder the run may not write,
    or one another run is writing, is refused at once. Within the claim,
    :func:`write_folder` (or :meth:`Claim.commit`) writes the files; when the
    claim ends, its staging folders and lock are removed whatever happened.

    Parameters
    ----------
    out : path
        The results folder. Missing parent folders are created.
    command : str, default "results"
        The command whose files are written (``"mine"``, ``"groups"``,
        ``"sweep"``, or :data:`REPORT`); the folder's record lists them under it.
    force : bool, default False
        Replace an existing folder comove wrote (only the files it lists), or
        with ``merge`` this command's files in it.
    merge : bool, default False
        Add this command's files to an existing folder comove wrote, keeping
        everything else.
    inputs : paths
        The run's input files: a folder holding one is never replaced.
    owned : names
        Files the command may replace in a folder with no record (the report's
        files in a folder of an older comove).

    Yields
    ------
    Claim

    Raises
    ------
    InputError
        When the folder may not be written (see :meth:`Claim.check`) or
        another run holds its lock (the message names that run's PID).
    """
    held = Claim(out, command, force, merge, inputs, owned)
    held.check()  # before the lock: a folder that is refused is not touched at all
    try:
        held.lock()
    except BaseException:
        held.release()  # parent folders made for the lock
        raise
    with _ACTIVE_GUARD:
        _ACTIVE[str(held.path)] = held
    try:
        held.clear_leftovers()
        held.check()
        yield held
    finally:
        with _ACTIVE_GUARD:
            _ACTIVE.pop(str(held.path), None)
        held.release()


def _command_of(files: Mapping[str, Writer]) -> str | None:
    """Return the command named in the run record among ``files``, or None."""
    content = getattr(files.get("run.json"), "content", None)
    if isinstance(content, dict) and isinstance(content.get("command"), str):
        return content["command"]
    return None


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
        Replace an existing folder that comove wrote: only the files its record
        lists, and never a folder holding anything else (with ``merge``: replace
        this command's files). Without it an existing folder is an error and
        nothing is written.
    merge : str, optional
        Add these files to an existing results folder of another command
        (named here, e.g. ``"groups"``): everything in it is kept, and
        ``run.json`` and ``quality.json`` are combined as
        ``{"by_command": {...}}``. A report of the folder's earlier results is
        removed (run ``comove report`` again).

    Returns
    -------
    Path
        ``out_dir``.

    Raises
    ------
    InputError
        When the folder may not be written (see :func:`claim`).

    Notes
    -----
    Within a :func:`claim` of the same folder the claim's lock and inputs
    apply; otherwise the folder is claimed for the write alone.
    """
    command = merge or _command_of(files)
    with _ACTIVE_GUARD:
        held = _ACTIVE.get(os.path.abspath(out_dir))
    if held is not None:
        held.command = command or held.command
        held.force, held.merge = force, merge is not None
        return held.commit(files)
    merging = merge is not None
    with claim(out_dir, command=command or "results", force=force, merge=merging) as mine:
        return mine.commit(files)
