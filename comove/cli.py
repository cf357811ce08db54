"""Command line: a thin layer over :mod:`comove.pipeline.core`.

Every option of a stage comes from the fields of that stage's settings
dataclass, so flags, defaults and the library share one definition.
"""

from __future__ import annotations

import argparse
import gc
import glob
import os
import signal
import sys
import threading
import typing
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import MISSING, fields
from pathlib import Path
from typing import Any, NoReturn

# Before numpy loads: one thread for OpenBLAS. comove's only matrix products are
# small, and OpenBLAS's idle threads spin for a while after start-up and after each
# call, taking a core from comove's own threads (measured: `comove groups` on a
# 90-minute match 3.40 s -> 3.16 s on two cores). A value the user set is kept.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
# No garbage collection while the libraries load: their hundreds of thousands of
# objects live to the end, and collections that walk them again and again (during
# the imports, the run and the interpreter's shutdown) cost ~0.15 s per run.
_COLLECTING = gc.isenabled()  # a program that imports this module keeps its own setting
gc.disable()

import pandas as pd  # noqa: E402

import comove  # noqa: E402
from comove.errors import ComoveNote, EngineError, InputError  # noqa: E402
from comove.groups.presets import PRESETS  # noqa: E402
from comove.io.results import CAUTION, Claim, claim, flat_settings, overall  # noqa: E402
from comove.io.runfile import current_names, former_names, load_run_file  # noqa: E402
from comove.io.times import human_seconds, utc_iso  # noqa: E402
from comove.pipeline.core import GROUP_STAGES, MINE_STAGES, groups, mine  # noqa: E402
from comove.pipeline.focal import FOCAL_STAGES, focal  # noqa: E402
from comove.pipeline.sweep import SWEEP_STAGES, sweep  # noqa: E402
from comove.tracks.quality import format_quality_summary  # noqa: E402

gc.freeze()  # what is loaded now stays: later collections skip it
if _COLLECTING:
    gc.enable()

EXIT_INPUT = 2

#: Help for the column options, which the reading stage names but documents here.
_COLUMN_HELP = {
    "id": "column of object ids (default: detected from common names)",
    "time": "column of times: ISO 8601 (zone-less means UTC), epoch s or ms (default: detected)",
    "x": "column of planar x in metres, or in --crs units (default: detected)",
    "y": "column of planar y in metres, or in --crs units (default: detected)",
    "lon": "column of longitude in degrees (WGS84); projected to a local metric CRS",
    "lat": "column of latitude in degrees (WGS84)",
    "role": "column of object roles (default: detected)",
    "crs": "CRS of the x/y columns when they are not planar metres, e.g. EPSG:32633",
    "time_unit": "unit of numeric times: s or ms (default: ms when values exceed 1e11)",
    "time_format": "strftime codes of the time text, e.g. %%d/%%m/%%Y %%H:%%M (default: ISO "
    "8601, or local day-first or month-first dates when the dates tell which)",
    "time_zone": "IANA zone of times written without one, e.g. Europe/Lisbon (default: UTC)",
    "layer": "layer of a GeoPackage that holds several (default: its only layer)",
}
_HIDDEN = {"require_role"}


class _Parser(argparse.ArgumentParser):
    """An argument parser whose errors are one line and exit with status 2."""

    def error(self, message: str) -> NoReturn:
        self.exit(EXIT_INPUT, f"{self.prog}: error: {message} (see {self.prog} --help)\n")


def _plain(text: str) -> str:
    """Return help text without the docstrings' code markup (double and single backquotes)."""
    return text.replace("``", "").replace("`", "")


def _yes_no(text: str) -> bool:
    """Return the truth value of a yes/no flag's text."""
    words = {"yes": True, "true": True, "on": True, "1": True,
             "no": False, "false": False, "off": False, "0": False}  # fmt: skip
    value = words.get(text.strip().lower())
    if value is None:
        raise argparse.ArgumentTypeError(f"expected yes or no, not {text!r}")
    return value


def _scalar_type(annotation: Any) -> Any:
    """Return the type a flag's text is read as, from a field annotation.

    ``float | None`` is read as float; a grid (``tuple[float, ...]``, optional
    or not) stays text, which its settings class reads (``start:stop:step`` or
    ``a,b,c``).
    """
    args = [a for a in typing.get_args(annotation) if a is not type(None)]
    if typing.get_origin(annotation) is not tuple and len(args) == 1:
        annotation = args[0]  # X | None
    if typing.get_origin(annotation) is tuple:
        return str
    if annotation is bool:
        return _yes_no
    return annotation


def _add_stage_options(
    parser: argparse.ArgumentParser,
    stages: tuple[type, ...],
    required: set[str],
    needed: str = "required: give it here or in the --config run file",
) -> None:
    for stage in stages:
        group = parser.add_argument_group(_plain(stage.__doc__.splitlines()[0].rstrip(".")))
        hints = typing.get_type_hints(stage)
        for f in fields(stage):
            if f.name in _HIDDEN:
                continue
            default = None if f.default is MISSING else f.default
            help_text = _plain(f.metadata.get("help") or _COLUMN_HELP.get(f.name, ""))
            choices = f.metadata.get("choices")
            if isinstance(default, tuple):
                default = ",".join(f"{v:g}" for v in default) or None
            if isinstance(default, bool):
                default = "yes" if default else "no"
            if default is not None:
                help_text += f" (default: {default})"
            elif f.default is MISSING and f.default_factory is MISSING:
                help_text += f" ({needed})"
            group.add_argument(
                "--" + f.name.replace("_", "-"),
                dest=f.name,
                type=_scalar_type(hints[f.name]),
                default=None,
                required=f.name in required,
                metavar=(
                    "yes|no"
                    if hints[f.name] is bool
                    else "|".join(choices)
                    if choices
                    else f.name.upper()
                ),  # fmt: skip
                choices=choices,
                help=help_text,
            )
        for old, new in getattr(stage, "FORMER_NAMES", {}).items():  # read for one release
            group.add_argument("--" + old.replace("_", "-"), dest=old,
                               type=_scalar_type(hints[new]), default=None,
                               help=argparse.SUPPRESS)  # fmt: skip


def _stage_options(args: argparse.Namespace, stages: tuple[type, ...]) -> dict[str, Any]:
    """Return the settings given as flags, former flag names read as the new ones."""
    names = {f.name for stage in stages for f in fields(stage)} - _HIDDEN
    names |= set(former_names(stages))
    given = {n: getattr(args, n) for n in names if getattr(args, n) is not None}
    return current_names(given, stages)


def build_parser() -> argparse.ArgumentParser:
    """Return the parser of the ``comove`` command."""
    parser = _Parser(prog="comove", description="Which roles and which objects move together.")
    parser.add_argument("--version", action="version", version=f"comove {comove.__version__}")
    sub = parser.add_subparsers(dest="command", required=True, parser_class=_Parser)
    _add_mine(sub)
    _add_groups(sub)
    _add_focal(sub)
    _add_sweep(sub)
    _add_report(sub)
    _add_demo(sub)
    return parser


def _add_analysis(
    sub: Any,
    name: str,
    stages: tuple[type, ...],
    *,
    input_help: str = "track file(s) or glob(s), as for comove mine",
    merge: bool = True,
    extra: Callable[[argparse.ArgumentParser], None] | None = None,
    **texts: str,
) -> None:
    """Add an analysis command: INPUT, --out, --config, ``extra`` flags, its settings' flags."""
    p = sub.add_parser(name, **texts)
    p.add_argument("input", nargs="*", help=input_help)
    p.add_argument("--out", type=Path, help="results folder to create")
    _add_config(p)
    if extra is not None:
        extra(p)
    if extra is _add_preset:
        needed = "required unless --preset or the --config run file gives it"
        _add_stage_options(p, stages, required=set(), needed=needed)
    else:
        _add_stage_options(p, stages, required=set())
    _add_common(p, merge=merge)


def _add_mine(sub: Any) -> None:
    """Add the ``comove mine`` command to the subcommands ``sub``."""
    _add_analysis(
        sub, "mine", MINE_STAGES,
        input_help="track file(s) or glob(s): CSV, TSV, Parquet, GeoParquet, GeoPackage, GeoJSON",
        help="durable role sets: which roles stay close together",
        description="Find the sets of roles whose objects stay close together.",
    )  # fmt: skip


def _add_preset(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "--preset",
        choices=sorted(PRESETS),
        default=None,
        help="defaults for a kind of data: "
        + "; ".join(f"{p.name}: {p.summary}" for p in PRESETS.values()),
    )


def _add_groups(sub: Any) -> None:
    """Add the ``comove groups`` command to the subcommands ``sub``."""
    _add_analysis(
        sub, "groups", GROUP_STAGES, extra=_add_preset,
        help="co-moving groups of objects: episodes and dyads",
        description="Find which objects travel together, when groups form and split, and "
        "how strongly each pair is associated. A preset supplies defaults; flags override "
        "them.",
    )  # fmt: skip


def _add_focal(sub: Any) -> None:
    """Add the ``comove focal`` command to the subcommands ``sub``."""
    _add_analysis(
        sub, "focal", FOCAL_STAGES,
        help="what surrounds one role: the role sets around its objects",
        description="For every object of the focal role at every snapshot, take the roles of "
        "its neighbours; find which role sets surround the focal role, how much of the time "
        "and for how long at a stretch.",
    )  # fmt: skip


def _add_sweep(sub: Any) -> None:
    """Add the ``comove sweep`` command to the subcommands ``sub``."""
    _add_analysis(
        sub, "sweep", SWEEP_STAGES, merge=False,
        help="the miner over a grid of radii and participation thresholds",
        description="Run the role co-location miner at every radius (and participation "
        "threshold) of a grid, reusing one alignment and one neighbour search, to see where "
        "results are stable.",
    )  # fmt: skip


def _add_report(sub: Any) -> None:
    """Add the ``comove report`` command to the subcommands ``sub``."""
    r = sub.add_parser(
        "report",
        help="an HTML report with figures of a results folder",
        description="Turn a results folder of comove mine, comove groups or both into "
        "one self-contained DIR/report.html, with the figures also as PNG files in "
        "DIR/figures/.",
    )
    r.add_argument("folder", type=Path, help="results folder")
    r.add_argument(
        "--max-points",
        type=int,
        default=50_000,
        help="most track positions drawn on the map (default: 50000)",
    )
    r.add_argument("--quiet", action="store_true", help="print nothing but errors")


def _add_demo(sub: Any) -> None:
    """Add the ``comove demo`` command to the subcommands ``sub``."""
    d = sub.add_parser(
        "demo",
        help="run the miner on a bundled invented scenario",
        description="Run comove mine on the bundled small-sided game.",
    )
    d.add_argument(
        "--out",
        type=Path,
        default=Path("comove-demo"),
        help="results folder to create (default: comove-demo)",
    )
    _add_common(d, merge=False)


def _add_config(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "--config", type=Path, metavar="FILE",
        help="run file: a TOML file of options (and input, out), or a results folder's "
        "run.json to repeat that run; flags given here override it",
    )  # fmt: skip
    p.add_argument(
        "--allow-changed-input", action="store_true",
        help="with a run.json: rerun even though its input files changed since that run "
        "(refused by default, since the results would no longer repeat it)",
    )  # fmt: skip


def _resolve(
    args: argparse.Namespace, stages: tuple[type, ...]
) -> tuple[Any, Path, dict[str, Any]]:
    """Return (source, out folder, options) from a run file overridden by the flags."""
    options: dict[str, Any] = {}
    if args.config is not None:
        options = load_run_file(args.config, args.command, stages)
    recorded = options.pop("input_digest", None)
    if recorded is not None and not args.input and not args.allow_changed_input:
        _check_unchanged(args.config, options.get("input", []), recorded)
    inputs = list(args.input) or options.pop("input", [])
    options.pop("input", None)
    out = args.out or (Path(options["out"]) if options.get("out") else None)
    options.pop("out", None)
    if getattr(args, "preset", None):
        options["preset"] = args.preset
    options.update(_stage_options(args, stages))
    if not inputs:
        raise InputError("no INPUT given; name track files, or an input in the --config file")
    if out is None:
        raise InputError("no --out given; name the results folder to create")
    return (inputs[0] if len(inputs) == 1 else inputs), out, options


def _check_unchanged(config: Path, inputs: list[str], recorded: str) -> None:
    """Refuse to repeat a run whose input files no longer hold what that run read."""
    from comove.io.provenance import input_digest

    try:
        now = input_digest(inputs if len(inputs) != 1 else inputs[0])
    except OSError as exc:
        raise InputError(f"{config}: cannot read the run's input again ({exc}); restore it, "
                         "or give INPUT") from None  # fmt: skip
    if now != recorded:
        raise InputError(
            f"{config}: the input files changed since that run (their digest is {now[:19]}…, "
            f"the run read {recorded[:19]}…); restore them, or give --allow-changed-input to "
            "run on them as they are now"
        )


def _add_common(p: argparse.ArgumentParser, merge: bool = True) -> None:
    p.add_argument(
        "--force",
        action="store_true",
        help="replace the files comove wrote in an existing results folder (a folder "
        "holding anything else is refused)",
    )
    if merge:
        p.add_argument(
            "--merge", action="store_true",
            help="add to an existing results folder of the other command (mine/groups)",
        )  # fmt: skip
    p.add_argument("--quiet", action="store_true", help="print nothing but errors")


def _input_files(source: Any) -> list[str]:
    """Return the files named by a run's input (patterns expanded), to keep them safe."""
    found: list[str] = []
    for item in source if isinstance(source, list) else [source]:
        text = os.path.expanduser(os.fspath(item))
        if any(ch in text for ch in "*?[") and not os.path.isfile(text):
            found += glob.glob(text, recursive=True)
        else:
            found.append(text)
    return found


@contextmanager
def _claimed(args: argparse.Namespace, out: Path, command: str, source: Any) -> Iterator[Claim]:
    """Hold the results folder for the run, before anything is computed."""
    merge = getattr(args, "merge", False)
    inputs = _input_files(source)
    with claim(out, command=command, force=args.force, merge=merge, inputs=inputs) as held:
        args.claims.append(held)
        yield held


def _written(out: Path, held: Claim, hint: str = "") -> None:
    """Print where the results went, and whether an outdated report was removed."""
    if held.report_removed:
        print(f"\nThe report of the folder's earlier results was removed; comove report {out} "
              "makes a new one.")  # fmt: skip
    print(f"\nResults written to {out}/{hint}")


def _report(result: comove.pipeline.core.MiningResult, out: Path, quiet: bool, held: Claim) -> None:
    if quiet:
        return
    print(format_quality_summary(result.quality))
    patterns = overall(result.patterns)
    n = len(patterns)
    print(f"\n{n} durable role set{'s' if n != 1 else ''} kept{_parts_note(result.patterns)}.")
    if n:
        shown = ["roles", "time_prevalence", "longest_run_s", "p_value", "q_value"]
        top = patterns.head(10)[[c for c in shown if c in patterns]].copy()
        # durations for people, as the report writes them; the files keep seconds
        top["longest_run_s"] = top["longest_run_s"].map(human_seconds)
        top = top.rename(columns={"longest_run_s": "longest_run"})
        print(top.to_string(index=False, float_format=lambda v: f"{v:.3f}"))
    _written(out, held, f" — for figures: comove report {out}")
    print(f"Caution: {result.run.get('caution', CAUTION)}")


def _parts_note(table: pd.DataFrame) -> str:
    """Return what the console adds when a table is split by period and area."""
    if "period" not in table.columns:
        return ""
    zones = len(table[["period", "area"]].drop_duplicates())
    return (" over every period and area (the files also give them per period and area"
            f", {zones} parts in all)" if zones > 1 else " over every period and area")  # fmt: skip


def _run_mine(args: argparse.Namespace) -> None:
    source, out_dir, options = _resolve(args, MINE_STAGES)
    options.pop("preset", None)
    if options.get("radius") is None:
        raise InputError("give --radius (metres), or radius in the --config file")
    with _claimed(args, out_dir, "mine", source) as held:
        result = mine(source, progress=not args.quiet, **options)
        out = result.write(out_dir, force=args.force, merge=args.merge)
    _report(result, out, args.quiet, held)


def _run_groups(args: argparse.Namespace) -> None:
    source, out_dir, options = _resolve(args, GROUP_STAGES)
    preset = options.pop("preset", None)
    with _claimed(args, out_dir, "groups", source) as held:
        result = groups(source, preset=preset, progress=not args.quiet, **options)
        out = result.write(out_dir, force=args.force, merge=args.merge)
    if args.quiet:
        return
    print(format_quality_summary(result.quality))
    episodes = overall(result.episodes)
    n = len(episodes)
    print(f"\n{n} episode{'s' if n != 1 else ''} of objects moving together"
          f"{_parts_note(result.episodes)}.")  # fmt: skip
    if n:
        top = episodes.sort_values("duration_s", ascending=False).head(10)
        # times and durations for people, as the quality summary writes them
        table = pd.DataFrame({
            "episode": top["episode"],
            "start": [utc_iso(t.value) for t in top["start"]],
            "duration": top["duration_s"].map(human_seconds),
            "together": top["together_s"].map(human_seconds),
            "members": top["members"],
        })  # fmt: skip
        print(table.to_string(index=False))
    listed = flat_settings(result.run)["dyad_pairs"]
    meaning = "together at least once" if listed == "together" else "seen at the same time"
    print(f"{len(overall(result.dyads))} pairs of objects {meaning} in dyads.csv.")
    _written(out, held, f" — for figures: comove report {out}")
    print(f"Caution: {result.run.get('caution', CAUTION)}")


def _run_focal(args: argparse.Namespace) -> None:
    source, out_dir, options = _resolve(args, FOCAL_STAGES)
    options.pop("preset", None)
    for name, flag in (("focal_role", "--focal-role ROLE"), ("radius", "--radius (metres)")):
        if options.get(name) is None:
            raise InputError(f"give {flag}, or {name} in the --config file")
    with _claimed(args, out_dir, "focal", source) as held:
        result = focal(source, progress=not args.quiet, **options)
        out = result.write(out_dir, force=args.force, merge=args.merge)
    if args.quiet:
        return
    print(format_quality_summary(result.quality))
    sets = overall(result.sets)
    role, n = options["focal_role"], len(sets)
    print(f"\n{n} role set{'s' if n != 1 else ''} durably around {role}"
          f"{_parts_note(result.sets)}.")  # fmt: skip
    if n:
        shown = ["around", "time_prevalence", "mean_share", "longest_run_s", "p_value", "q_value"]
        top = sets.head(10)[[c for c in shown if c in sets]].copy()
        top["longest_run_s"] = top["longest_run_s"].map(human_seconds)
        top = top.rename(columns={"longest_run_s": "longest_run"})
        print(top.to_string(index=False, float_format=lambda v: f"{v:.3f}"))
    hoods = overall(result.neighbourhoods)
    alone = hoods.loc[hoods["size"] == 0, "share"].sum()
    print(f"Alone (no object within the neighbour distance): {alone:.1%} of the time.")
    _written(out, held, f" — for figures: comove report {out}")
    print(f"Caution: {result.run.get('caution', CAUTION)}")


def _run_sweep(args: argparse.Namespace) -> None:
    source, out_dir, options = _resolve(args, SWEEP_STAGES)
    options.pop("preset", None)
    with _claimed(args, out_dir, "sweep", source):
        result = sweep(source, progress=not args.quiet, **options)
        out = result.write(out_dir, force=args.force)
    if args.quiet:
        return
    print(format_quality_summary(result.quality))
    kept = result.table[result.table["kept"]]
    grid = flat_settings(result.run)
    print(f"\n{len(grid['radius'])} radii x {len(grid['min_participation'])} thresholds; "
          f"{kept['roles'].nunique()} role sets kept somewhere on the grid.")  # fmt: skip
    print(f"Results written to {out}/ (sweep.csv, sweep.png)")


def _run_report(args: argparse.Namespace) -> None:
    from comove.present.report import build_report

    path = build_report(args.folder, max_points=args.max_points)
    if not args.quiet:
        print(f"Report written to {path}")


def _run_demo(args: argparse.Namespace) -> None:
    from comove.io.scenarios import demo_options

    source, options = demo_options()
    if not args.quiet:
        print(f"Demo scenario: {source}")
    with _claimed(args, args.out, "mine", source) as held:
        result = mine(source, progress=not args.quiet, **options)
        out = result.write(args.out, force=args.force)
    _report(result, out, args.quiet, held)


class _Stopped(BaseException):
    """A signal to stop (SIGTERM, SIGHUP): unwinds the run like KeyboardInterrupt."""

    def __init__(self, signum: int) -> None:
        super().__init__(signum)
        self.signum = signum


_STOP_SIGNALS = (signal.SIGINT, signal.SIGTERM, signal.SIGHUP)


def _stop_workers() -> None:
    """Kill the run's worker processes: none outlives the run, and their pools fail at once."""
    import multiprocessing

    for child in multiprocessing.active_children():
        child.kill()


@contextmanager
def _stopping_on_signals(seen: list[int]) -> Iterator[None]:
    """Turn SIGINT, SIGTERM and SIGHUP into exceptions that unwind the run and its cleanup.

    The first signal kills the run's worker processes, is recorded in ``seen``
    and raises KeyboardInterrupt (SIGINT) or :class:`_Stopped`; later ones are
    ignored while the run cleans up. A worker process forked with these
    handlers exits at once, quietly. When the exception is raised where Python
    swallows exceptions (a garbage-collector or finaliser callback of a
    library), it is not printed, and the caller learns of the signal from
    ``seen``. The previous handlers are restored afterwards.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    home = os.getpid()

    def stop(signum: int, _frame: Any) -> None:
        if os.getpid() != home:
            os._exit(128 + signum)
        if seen:
            return
        seen.append(signum)
        _stop_workers()
        if signum == signal.SIGINT:
            raise KeyboardInterrupt
        raise _Stopped(signum)

    hook = sys.unraisablehook

    def quiet(unraisable: Any) -> None:
        if not issubclass(unraisable.exc_type, (_Stopped, KeyboardInterrupt)):
            hook(unraisable)

    old = {s: signal.signal(s, stop) for s in _STOP_SIGNALS}
    sys.unraisablehook = quiet
    try:
        yield
    finally:
        sys.unraisablehook = hook
        for s, handler in old.items():
            signal.signal(s, signal.SIG_DFL if handler is None else handler)


def _left(args: argparse.Namespace) -> str:
    """Return what a stopped run left: nothing, or a folder it had finished writing."""
    done = [str(c.target) for c in args.claims if c.committed]
    return f"{done[0]} had been written in full" if done else "nothing was written"


def main(argv: list[str] | None = None) -> int:
    """Run the ``comove`` command and return its exit status.

    Errors in the input are one line and exit status 2; a run its engine could
    not carry out (:class:`~comove.errors.EngineError`) is one line and exit
    status 1. SIGINT, SIGTERM and SIGHUP stop the run with one line and exit
    status 128 + the signal's number (130, 143, 129), after its worker
    processes, temporary folders and lock are removed.
    """
    try:
        args = build_parser().parse_args(argv)
    except SystemExit as done:  # --help, --version, or a usage error already printed
        return int(done.code or 0)
    args.claims = []
    commands = {"mine": _run_mine, "groups": _run_groups, "focal": _run_focal,
                "sweep": _run_sweep,
                "report": _run_report, "demo": _run_demo}  # fmt: skip
    seen: list[int] = []
    try:
        with _stopping_on_signals(seen), _notes_printed(args.command):
            commands[args.command](args)
    except KeyboardInterrupt:
        return _stopped(args, signal.SIGINT)
    except _Stopped as stop:
        return _stopped(args, stop.signum)
    except (InputError, EngineError, OSError) as err:
        if seen:  # a signal whose exception a library swallowed; what failed is its doing
            return _stopped(args, seen[0])
        return _failed(args, err)
    if seen:  # the signal's exception was swallowed and the run went on to its end
        return _stopped(args, seen[0])
    return 0


def _stopped(args: argparse.Namespace, signum: int) -> int:
    """Print the one line of a run stopped by a signal; return its exit status."""
    if signum == signal.SIGINT:
        print(f"comove {args.command}: interrupted; {_left(args)}", file=sys.stderr)
    else:
        name = signal.Signals(signum).name
        print(f"comove {args.command}: stopped by {name}; {_left(args)}", file=sys.stderr)
    return 128 + int(signum)


def _failed(args: argparse.Namespace, err: Exception) -> int:
    """Print the one line of a failed run; return its exit status (2: the input, else 1)."""
    if isinstance(err, InputError):
        print(f"comove {args.command}: error: {err.worded_for('--')}", file=sys.stderr)
        return EXIT_INPUT
    if isinstance(err, OSError):
        where = f"{err.filename}: " if err.filename else ""
        print(f"comove {args.command}: error: {where}{err.strerror or err}", file=sys.stderr)
        return 1
    print(f"comove {args.command}: error: {err}", file=sys.stderr)
    return 1


@contextmanager
def _notes_printed(command: str) -> Iterator[None]:
    """Print the run's notes (:class:`~comove.errors.ComoveNote`) as one line each on stderr."""
    import warnings

    shown = warnings.showwarning

    def show(message, category, filename, lineno, file=None, line=None) -> None:  # noqa: ANN001
        if issubclass(category, ComoveNote):
            print(f"comove {command}: note: {message}", file=sys.stderr)
        else:
            shown(message, category, filename, lineno, file, line)

    with warnings.catch_warnings():
        warnings.simplefilter("always", ComoveNote)
        warnings.showwarning = show
        yield


if __name__ == "__main__":
    sys.exit(main())
