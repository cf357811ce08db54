"""Run files: describe a run in TOML, or repeat one from its ``run.json``.

A TOML run file holds the command's options as top-level keys, with the same
names as the long flags (``min_prevalence`` or ``min-prevalence``), plus
``input`` (a path, a glob, or a list of them) and optionally ``out``::

    input = "synthetic_tracks/fleet/vehicles.csv"
    out = "fleet-results"
    radius = 150
    min_prevalent_time = 600
    replicates = 199
    seed = 7

A results folder's ``run.json`` is accepted too: its recorded input and
effective settings (seed included) repeat the run. Flags given on the command
line override the file. An unknown key is an error that names it.
"""

from __future__ import annotations

import tomllib
import warnings
from dataclasses import fields
from pathlib import Path
from types import UnionType
from typing import Any, get_args, get_origin, get_type_hints

import numpy as np

from comove.errors import InputError, RenamedSetting, bad_setting
from comove.io.results import flat_settings, run_records

#: Keys of a run file that are not stage settings.
RUN_KEYS = ("input", "out", "preset")


def _stage_fields(stages: tuple[type, ...]) -> set[str]:
    return {f.name for stage in stages for f in fields(stage)}


def former_names(stages: tuple[type, ...]) -> dict[str, str]:
    """Return the former names of the stages' settings, each with its name now.

    A stage lists them in its ``FORMER_NAMES``; each is read for one release
    after the renaming, with a note.
    """
    return {old: new for stage in stages for old, new in getattr(stage, "FORMER_NAMES", {}).items()}


def current_names(options: dict[str, Any], stages: tuple[type, ...]) -> dict[str, Any]:
    """Return ``options`` with settings given by a former name under their name now.

    Each former name gives a :class:`~comove.errors.RenamedSetting` note.

    Raises
    ------
    InputError
        When a setting is given under both names with different values.
    """
    former = former_names(stages)
    out = {k: v for k, v in options.items() if k not in former}
    for old, new in former.items():
        if old not in options:
            continue
        if new in out and out[new] != options[old]:
            raise bad_setting(new, f"is given twice, also by its former name {old}; keep one")
        out[new] = options[old]
        warnings.warn(
            RenamedSetting(
                f"{old} (--{old.replace('_', '-')}) is now {new} (--{new.replace('_', '-')}); "
                "the former name is read until the next release"
            ),
            stacklevel=3,
        )
    return out


def _stage_types(stages: tuple[type, ...]) -> dict[str, Any]:
    """Return each stage setting's type hint, by name."""
    hints: dict[str, Any] = {}
    for stage in stages:
        resolved = get_type_hints(stage)
        for f in fields(stage):
            hints.setdefault(f.name, resolved[f.name])
    return hints


def _typed(source: Path, key: str, value: Any, hint: Any) -> Any:
    """Return a run file's ``value`` for setting ``key`` as its type ``hint`` takes it.

    Numbers are what a number setting takes (an integral float for a whole
    number); text settings take text, or a number written as text; a grid takes
    a list of numbers or its text; a switch takes true or false; an optional
    setting takes none (``null`` in run.json).

    Raises
    ------
    InputError
        When no type of the hint takes the value, naming the file, key and value.
    """
    options = get_args(hint) if isinstance(hint, UnionType) else (hint,)
    for option in options:
        ok, out = _fits(value, option)
        if ok:
            return out
    wanted = " or ".join(dict.fromkeys(_TYPE_WORDS.get(_base(o), "a value") for o in options))
    raise InputError(f"{source}: {key} = {value!r} must be {wanted}; fix the file")


_TYPE_WORDS = {
    float: "a number", int: "a whole number", bool: "true or false", str: "text",
    tuple: "a list of numbers or grid text such as '1:5:1'", type(None): "left out",
}  # fmt: skip


def _base(hint: Any) -> Any:
    return get_origin(hint) or hint


def _fits(value: Any, hint: Any) -> tuple[bool, Any]:
    """Return whether ``value`` is of type ``hint`` (loosely, as above), and it converted."""
    number = isinstance(value, (int, float)) and not isinstance(value, bool)
    base = _base(hint)
    if base is type(None):
        return value is None, None
    if base is bool:
        return isinstance(value, bool), value
    if base is float:
        return number, float(value) if number else value
    if base is int:
        whole = number and float(value).is_integer()
        return whole, int(value) if whole else value
    if base is str:
        if number:
            return True, f"{value:g}" if isinstance(value, float) else str(value)
        return isinstance(value, str), value
    if base is tuple:
        listed = isinstance(value, (list, tuple)) and all(
            isinstance(v, (int, float)) and not isinstance(v, bool) for v in value
        )
        return listed or isinstance(value, str), value
    return True, value  # a type this check does not know: the setting itself validates


def load_run_file(path: str | Path, command: str, stages: tuple[type, ...]) -> dict[str, Any]:
    """Return the options in a TOML run file or a ``run.json``, keyed by option name.

    Parameters
    ----------
    path : path
        ``*.toml`` run file, or a results folder's ``run.json`` (or the folder).
    command : str
        ``"mine"`` or ``"groups"``: which command's settings to take from a
        ``run.json`` that holds both.
    stages : tuple of type
        The command's stage settings dataclasses; their fields are the known
        option names.

    Returns
    -------
    dict
        Option name -> value; ``input`` (list of str), ``out`` and ``preset``
        when given; from a ``run.json``, ``input_digest``, the digest of the
        input that run read.

    Raises
    ------
    InputError
        When the file cannot be read or parsed, holds an unknown key, or is a
        ``run.json`` of another command or of an in-memory input.
    """
    p = Path(path)
    if p.is_dir():
        p = p / "run.json"
    if not p.is_file():
        raise InputError(f"{p}: no such run file; give a .toml run file or a results run.json")
    former = former_names(stages)
    known = _stage_fields(stages) | set(former)
    hints = _stage_types(stages)
    hints.update({old: hints[new] for old, new in former.items() if new in hints})
    if p.suffix.lower() == ".json":
        return current_names(_from_run_json(p, command, known, hints), stages)
    try:
        raw = tomllib.loads(p.read_text())
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise InputError(f"{p}: not valid TOML ({exc}); fix the file") from None
    options: dict[str, Any] = {}
    for key, value in raw.items():
        name = key.replace("-", "_")
        if name not in known and name not in RUN_KEYS:
            raise InputError(
                f"{p}: unknown key {key!r}; use the long option names of comove {command} "
                "(see comove {command} --help)".replace("{command}", command)
            )
        if isinstance(value, dict):
            raise InputError(f"{p}: key {key!r} is a table; give options as top-level keys")
        if name in ("out", "preset") and not isinstance(value, str):
            raise InputError(f"{p}: {key} = {value!r} must be text; fix the file")
        options[name] = _typed(p, key, value, hints[name]) if name in hints else value
    if "input" in options:
        options["input"] = _inputs(options["input"], p)
    if isinstance(options.get("out"), str) and not Path(options["out"]).is_absolute():
        options["out"] = str(p.parent / options["out"])
    return current_names(options, stages)


def _inputs(value: Any, source: Path) -> list[str]:
    """Return input paths from a run file, relative ones resolved against its folder."""
    items = value if isinstance(value, list) else [value]
    if not items or not all(isinstance(v, str) for v in items):
        raise InputError(f"{source}: 'input' must be a path or a list of paths")
    return [v if Path(v).is_absolute() else str(source.parent / v) for v in items]


def _from_run_json(p: Path, command: str, known: set[str], hints: dict[str, Any]) -> dict[str, Any]:
    runs = run_records(p)
    if command not in runs and len(runs) == 1:
        other = next(iter(runs))
        raise InputError(f"{p}: records a {other!r} run, not {command}; "
                         f"use comove {other} --config")  # fmt: skip
    if command not in runs:
        raise InputError(f"{p}: holds no {command} run; its runs: "
                         f"{', '.join(runs) or 'none'}")  # fmt: skip
    run = runs[command]
    options: dict[str, Any] = {}
    for key, value in flat_settings(run).items():
        if key not in known:
            raise InputError(f"{p}: unknown setting {key}; was it made by another version "
                             "of comove?")  # fmt: skip
        options[key] = _typed(p, key, value, hints[key])
    recorded = run.get("input")
    if not isinstance(recorded, list):
        raise InputError(f"{p}: the run read an in-memory table ({recorded}); give INPUT")
    options["input"] = recorded
    if isinstance(run.get("input_digest"), str):  # checked against the files by the caller
        options["input_digest"] = run["input_digest"]
    if run.get("preset") is not None:
        options["preset"] = run["preset"]
    return options


#: Most values a grid (``start:stop:step``) may hold: each is a radius or threshold
#: to evaluate over the whole run, so even this many means hours of work.
MAX_GRID_VALUES = 10_000


def parse_grid(text: str, setting: str) -> tuple[float, ...]:
    """Return the values of ``start:stop:step`` (stop included) or ``a,b,c`` text.

    Examples
    --------
    >>> parse_grid("1:2:0.5", "radius"), parse_grid("3, 5", "radius")
    ((1.0, 1.5, 2.0), (3.0, 5.0))
    """
    try:
        if ":" in text:
            start, stop, step = (float(v) for v in text.split(":"))
            if not (np.isfinite(start) and np.isfinite(stop) and np.isfinite(step)):
                raise ValueError
            if step <= 0:
                raise bad_setting(setting, f"{text}: the step must be above 0, as in 1:5:0.5")
            if stop < start:
                raise bad_setting(setting, f"{text} runs backwards: give start:stop:step with "
                                  f"the stop at or above the start, as in {stop:g}:{start:g}:"
                                  f"{step:g}")  # fmt: skip
            count = np.floor((stop - start) / step + 0.5) + 1
            if count > MAX_GRID_VALUES:  # counted before any value is made
                raise bad_setting(
                    setting,
                    f"{text} holds {count:,.0f} values, more than the {MAX_GRID_VALUES:,} a "
                    "grid may hold; give a larger step",
                )
            values = np.round(np.arange(start, stop + step / 2, step), 10)
        else:
            values = np.array([float(v) for v in text.split(",") if v.strip()])
    except ValueError:
        raise bad_setting(
            setting,
            "must be start:stop:step (stop >= start, step > 0) or a comma-separated list of "
            "numbers",
        ) from None
    if values.size == 0:
        raise bad_setting(setting, "is empty; give at least one value")
    return tuple(float(v) for v in values)


def as_grid(value: Any, setting: str) -> tuple[float, ...]:
    """Return a grid of values given as grid text, one number, or a list of numbers."""
    if isinstance(value, str):
        return parse_grid(value, setting)
    items = value if isinstance(value, (list, tuple)) else [value]
    try:
        return tuple(float(v) for v in items)
    except (TypeError, ValueError):
        raise bad_setting(setting, "must be numbers, or grid text such as 1:5:1") from None
