"""Run every bundled scenario through every command, and compare two such runs.

Used to show that a change of structure changes no result: run it once with
the code before the change and once after, then compare the two folders::

    git worktree add /tmp/comove-before <commit before>
    PYTHONPATH=/tmp/comove-before python benchmarks/results_identity.py run /tmp/before
    python benchmarks/results_identity.py run /tmp/after
    python benchmarks/results_identity.py compare /tmp/before /tmp/after

``run`` executes, for each scenario, the tutorial's ``mine`` (with cross-K),
``groups --merge`` and ``report`` commands with a fixed seed, a ``mine`` under
the role shuffle, and a ``sweep``, each into its own results folder.
``compare`` then checks every file: CSV and JSON text exactly (leaving out
what names the moment or the machine of a run: ``created``, versions, input
paths, the checkout's folder), Parquet tables value for value, PNG figures pixel for pixel, and the
report's HTML after its embedded pictures are compared as pictures. It prints
one line per difference and exits 1 when there is any. Each folder's record of
the files comove wrote into it (``comove.io.results.MANIFEST``) is left out of the
comparison: it lists the files compared here, and folders written before it
existed have none.
"""

from __future__ import annotations

import argparse
import base64
import io
import json
import os
import re
import subprocess
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
DATA = REPO / "synthetic_tracks"

#: Small number of null replicates: enough to compare p-values, quick to run.
PERMUTATIONS = "39"

SCENARIOS: dict[str, dict[str, list[str]]] = {
    "game": {
        "input": [str(DATA / "small_sided_game/players.csv.gz"), "--id", "player", "--time",
                  "t", "--x", "x", "--y", "y", "--role", "role"],
        "mine": ["--radius", "3", "--step", "0.1", "--min-prevalent-time", "30",
                 "--k-radii", "1:6:1"],
        "groups": ["--preset", "team-sport", "--radius", "3", "--step", "0.1"],
        "roles": ["--radius", "3", "--step", "0.1", "--min-prevalent-time", "30",
                  "--null", "role-shuffle", "--shuffle-strata", "_"],
        "sweep": ["--radius", "2:4:1", "--min-participation", "0.4,0.5", "--step", "0.1"],
    },
    "fleet": {
        "input": [str(DATA / "fleet/vehicles.csv")],
        "mine": ["--radius", "150", "--max-speed", "60", "--min-prevalent-time", "600",
                 "--k-radii", "50:250:50"],
        "groups": ["--preset", "vehicles", "--radius", "150", "--max-speed", "60"],
        "roles": ["--radius", "150", "--max-speed", "60", "--null", "role-shuffle"],
        "sweep": ["--radius", "100:200:50", "--max-speed", "60"],
    },
    "herd": {
        "input": [str(DATA / "herd/collars/*.csv"), "--role", "sex_age"],
        "mine": ["--radius", "300", "--step", "3600", "--max-gap", "10800",
                 "--min-prevalent-time", "86400", "--k-radii", "100,300"],
        "groups": ["--preset", "collars", "--radius", "300"],
        "roles": ["--radius", "300", "--step", "3600", "--max-gap", "10800",
                  "--null", "role-shuffle"],
        "sweep": ["--radius", "200,300", "--step", "3600", "--max-gap", "10800"],
    },
}  # fmt: skip


def _comove(args: list[str]) -> None:
    cmd = [sys.executable, "-c", "import sys; from comove.cli import main; sys.exit(main())",
           *args, "--quiet"]  # fmt: skip
    if args[0] == "report":
        cmd.remove("--quiet")
    done = subprocess.run(cmd, capture_output=True, text=True, env=os.environ.copy())
    if done.returncode != 0:
        raise SystemExit(f"comove {' '.join(args)} failed:\n{done.stderr}")


def run(out: Path) -> None:
    """Write the results folders of every scenario and command below ``out``."""
    out.mkdir(parents=True, exist_ok=False)
    seed = ["--seed", "1", "--replicates", PERMUTATIONS, "--jobs", "2"]
    for name, s in SCENARIOS.items():
        both = str(out / f"{name}-both")
        _comove(["mine", *s["input"], *s["mine"], *seed, "--out", both])
        _comove(["groups", *s["input"], *s["groups"], *seed, "--out", both, "--merge"])
        _comove(["report", both])
        _comove(["mine", *s["input"], *s["roles"], *seed, "--out", str(out / f"{name}-roles")])
        _comove(["sweep", *s["input"], *s["sweep"], "--jobs", "2",
                 "--out", str(out / f"{name}-sweep")])  # fmt: skip
        print(f"{name}: done", flush=True)


#: Keys of run.json that name the moment, the machine or the code, not the result.
VOLATILE = {"created", "versions", "input", "input_sha256", "out"}


#: The checkout a run read its data from: runs of two checkouts name different folders.
_CHECKOUT = re.compile(r"[^\s<>\"']*/(?=synthetic_tracks/)")


def _strip(value: object) -> object:
    if isinstance(value, dict):
        return {k: _strip(v) for k, v in value.items() if k not in VOLATILE}
    if isinstance(value, list):
        return [_strip(v) for v in value]
    if isinstance(value, str):
        return _CHECKOUT.sub("", value)
    return value


def _same_png(a: bytes, b: bytes) -> bool:
    import numpy as np
    from matplotlib.image import imread

    pa, pb = imread(io.BytesIO(a), format="png"), imread(io.BytesIO(b), format="png")
    return pa.shape == pb.shape and bool(np.array_equal(pa, pb))


_IMG = re.compile(r"data:image/png;base64,([A-Za-z0-9+/=]+)")
#: Rows of the report's run table that name the moment or the code of a run.
_VOLATILE_ROWS = re.compile(r"<tr><td>(created|versions)</td><td>[^<]*</td></tr>")


def _compare_file(a: Path, b: Path) -> str | None:
    """Return a one-line difference between two files of the same name, or None."""
    import pandas as pd

    suffix = a.suffix.lower()
    if suffix == ".json":
        ja, jb = json.loads(a.read_text()), json.loads(b.read_text())
        return None if _strip(ja) == _strip(jb) else "JSON content differs"
    if suffix == ".parquet":
        fa, fb = pd.read_parquet(a), pd.read_parquet(b)
        try:
            pd.testing.assert_frame_equal(fa, fb, check_exact=True)
        except AssertionError as err:
            return "table differs: " + " ".join(str(err).split())[:300]
        return None
    if suffix == ".png":
        return None if _same_png(a.read_bytes(), b.read_bytes()) else "figure differs"
    if suffix == ".html":
        ta, tb = a.read_text(), b.read_text()
        ia, ib = _IMG.findall(ta), _IMG.findall(tb)
        # pictures out first: the checkout pattern would crawl through their base64 text
        plain_a, plain_b = (_CHECKOUT.sub("", _VOLATILE_ROWS.sub("", _IMG.sub("IMG", t)))
                            for t in (ta, tb))  # fmt: skip
        if plain_a != plain_b or len(ia) != len(ib):
            return "HTML text differs"
        for k, (x, y) in enumerate(zip(ia, ib, strict=True)):
            if not _same_png(base64.b64decode(x), base64.b64decode(y)):
                return f"embedded figure {k + 1} differs"
        return None
    return None if a.read_bytes() == b.read_bytes() else "content differs"


def _files(root: Path) -> set[Path]:
    """Return the files below ``root`` that hold results (every one but the folders' records)."""
    from comove.io.results import MANIFEST

    return {p.relative_to(root) for p in root.rglob("*") if p.is_file() and p.name != MANIFEST}


def compare(before: Path, after: Path) -> int:
    """Print every difference between two trees of results folders; return their number.

    The folders' records of what comove wrote (``comove.io.results.MANIFEST``)
    are not compared.
    """
    found = 0
    names_a = _files(before)
    names_b = _files(after)
    for rel in sorted(names_a ^ names_b):
        print(f"{rel}: only in {'before' if rel in names_a else 'after'}")
        found += 1
    for rel in sorted(names_a & names_b):
        diff = _compare_file(before / rel, after / rel)
        if diff:
            print(f"{rel}: {diff}")
            found += 1
    print(f"{len(names_a & names_b)} files compared, {found} difference(s)")
    return found


def main() -> int:
    """Run or compare, as the command line says."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    sub = parser.add_subparsers(dest="what", required=True)
    r = sub.add_parser("run", help="write every scenario's results below OUT")
    r.add_argument("out", type=Path)
    c = sub.add_parser("compare", help="compare two trees written by run")
    c.add_argument("before", type=Path)
    c.add_argument("after", type=Path)
    args = parser.parse_args()
    if args.what == "run":
        run(args.out)
        return 0
    return 1 if compare(args.before, args.after) else 0


if __name__ == "__main__":
    sys.exit(main())
