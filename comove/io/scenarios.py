"""The bundled invented scenarios in ``synthetic_tracks/`` and their planted truth.

Each scenario folder holds a generator, its data and ``truth.json``, which
names the input, its columns and the settings the scenario is meant for.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from comove.errors import InputError


def _scenarios_dir() -> Path:
    """Return the scenarios' folder: the checkout's ``synthetic_tracks``, else the package's copy.

    A wheel carries them as ``comove/scenario_files`` (see pyproject.toml), so
    that an installed comove runs its demo from any folder.
    """
    checkout = Path(__file__).resolve().parents[2] / "synthetic_tracks"
    if checkout.is_dir():
        return checkout
    return Path(__file__).resolve().parents[1] / "scenario_files"


SCENARIOS_DIR = _scenarios_dir()
DEMO_SCENARIO = "small_sided_game"

#: truth.json parameter names that are settings of ``comove mine``.
_MINE_SETTINGS = ("radius", "min_participation", "min_prevalence", "min_prevalent_time", "step",
                  "max_gap", "max_size", "max_speed")  # fmt: skip


def scenario_names(kind: str = "roles") -> list[str]:
    """Return the names of the bundled scenarios of one kind.

    ``"roles"``: scenarios with planted role sets, for ``comove mine`` (and
    planted episodes for ``comove groups``); ``"groups"``: scenarios that plant
    only groups of individuals among strangers, without roles.
    """
    names = []
    for path in sorted(SCENARIOS_DIR.glob("*/truth.json")):
        planted_roles = "planted" in json.loads(path.read_text())
        if planted_roles == (kind == "roles"):
            names.append(path.parent.name)
    return names


def load_truth(name: str) -> dict[str, Any]:
    """Return the planted truth of scenario ``name``."""
    path = SCENARIOS_DIR / name / "truth.json"
    if not path.is_file():
        raise InputError(
            f"{path}: scenario not found; reinstall comove (its package carries the "
            "scenarios) or run from the source checkout"
        )
    return json.loads(path.read_text())


def mine_options(name: str) -> tuple[str, dict[str, Any]]:
    """Return the input path (or glob) and the ``mine`` options of scenario ``name``."""
    truth = load_truth(name)
    source = str(SCENARIOS_DIR / name / truth["input"])
    options = {k: v for k, v in truth.get("columns", {}).items()}
    params = truth.get("parameters", {})
    options.update({k: params[k] for k in _MINE_SETTINGS if k in params})
    return source, options


def demo_options() -> tuple[str, dict[str, Any]]:
    """Return the input and options of the demo run (the small-sided game)."""
    return mine_options(DEMO_SCENARIO)
