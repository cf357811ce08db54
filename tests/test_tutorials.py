"""Every command in the tutorials runs, so the docs cannot rot."""

from __future__ import annotations

import re
import shlex
from pathlib import Path

import pytest

from comove.cli import main

REPO = Path(__file__).resolve().parents[1]
TUTORIALS = sorted((REPO / "docs" / "tutorials").glob("*.md"))


def snippets(path: Path) -> list[str]:
    return re.findall(r"```python\n(.*?)```", path.read_text(), flags=re.S)


def commands(path: Path) -> list[str]:
    blocks = re.findall(r"```sh\n(.*?)```", path.read_text(), flags=re.S)
    return [line for block in blocks for line in block.splitlines() if line.startswith("comove ")]


def test_there_is_a_tutorial_per_kind_of_user():
    assert {p.stem for p in TUTORIALS} == {"team-sport", "fleet", "herd"}


@pytest.mark.parametrize("tutorial", TUTORIALS, ids=lambda p: p.stem)
def test_tutorial_commands_run(tutorial, tmp_path, monkeypatch, capsys):
    # the commands use repository-relative paths: run them beside a link to the data
    (tmp_path / "synthetic_tracks").symlink_to(REPO / "synthetic_tracks")
    monkeypatch.chdir(tmp_path)
    lines = commands(tutorial)
    assert len(lines) >= 3
    for line in lines:
        code = main(shlex.split(line)[1:] + ["--quiet"] * ("report" not in line))
        assert code == 0, f"{tutorial.name}: {line}\n{capsys.readouterr().err}"
    for line in lines:
        if " --out " in line:
            out = line.split(" --out ")[1].split()[0]
            assert (tmp_path / out / "run.json").is_file()
    reports = [line.split()[-1] for line in lines if line.startswith("comove report")]
    for folder in reports:
        assert (tmp_path / folder / "report.html").is_file()
    for code in snippets(tutorial):  # the Python steps run on what the commands wrote
        names: dict = {}
        exec(compile(code, f"{tutorial.name} (python block)", "exec"), names)
        if "closest" in names:  # what the team-sport text says of the marking pairs
            assert names["closest"]["A03"] == "T05" and names["closest"]["A02"] == "T04"
        if "clear_leads" in names:  # and of who leads in the counter-attacks
            leads = names["clear_leads"]
            assert list(zip(leads["leader"], leads["follower"], strict=True)) == [("T02", "T03")]
            assert round(float(leads["delay_s"].iloc[0]), 2) == 0.62
            assert bool(leads["significant"].iloc[0])  # tested in the tutorial's run
