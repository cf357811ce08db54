"""The results folder never loses a user's data: --force, --merge, the lock, signals, crashes."""

from __future__ import annotations

import json
import os
import shutil
import signal
import stat
import subprocess
import sys
import textwrap
import time

import psutil
import pytest

from comove.cli import main
from comove.errors import InputError
from comove.io import results
from comove.io.results import (
    MANIFEST,
    REPORT,
    claim,
    json_writer,
    open_results,
    read_manifest,
    text_writer,
    write_folder,
)
from comove.io.scenarios import mine_options

QUICK = ["--radius", "2", "--replicates", "0", "--quiet"]


def run(argv, capsys):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def tree(folder):
    """Every path below ``folder`` with the bytes of its files (None for folders)."""
    return {
        str(p.relative_to(folder)): (p.read_bytes() if p.is_file() else None)
        for p in sorted(folder.rglob("*"))
    }


def hidden(folder):
    return sorted(p.name for p in folder.iterdir() if p.name.startswith("."))


def python(code, *args, **kwargs):
    """Start a Python process running ``code`` with ``args``, its output readable by line."""
    return subprocess.Popen(
        [sys.executable, "-c", textwrap.dedent(code), *map(str, args)],
        stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
        **kwargs,
    )  # fmt: skip


# ---------------------------------------------------------------- --force


def test_force_never_replaces_a_folder_holding_the_input(tmp_path, tracks_csv, capsys):
    inp = tmp_path / "inp"
    inp.mkdir()
    source = shutil.move(tracks_csv, inp / "small.csv")
    before = tree(inp)
    code, _, err = run(["mine", source, *QUICK, "--out", inp, "--force"], capsys)
    assert code == 2 and err.count("\n") == 1
    assert "small.csv, an input of this run" in err and "choose another --out" in err
    assert tree(inp) == before


@pytest.mark.parametrize("merge", [False, True])
def test_input_inside_a_comove_folder_is_never_replaced(tmp_path, tracks_csv, capsys, merge):
    # the input has the name of a file comove wrote there: neither --force nor
    # --merge --force may replace it
    out = tmp_path / "res"
    assert run(["mine", tracks_csv, *QUICK, "--out", out], capsys)[0] == 0
    shutil.copy(tracks_csv, out / "patterns.csv")
    before = tree(out)
    flags = ["--force", "--merge"] if merge else ["--force"]
    code, _, err = run(["mine", out / "patterns.csv", *QUICK, "--out", out, *flags], capsys)
    assert code == 2 and "patterns.csv, an input of this run" in err
    assert tree(out) == before


@pytest.mark.parametrize("extra", ["file", "folder"])
def test_force_refuses_a_comove_folder_holding_a_users_file(tmp_path, tracks_csv, capsys, extra):
    out = tmp_path / "res"
    assert run(["mine", tracks_csv, *QUICK, "--out", out], capsys)[0] == 0
    if extra == "file":
        (out / "notes.txt").write_text("my notes")
    else:
        (out / "mine").mkdir()
        (out / "mine" / "plot.png").write_bytes(b"png")
    before = tree(out)
    code, _, err = run(["mine", tracks_csv, *QUICK, "--out", out, "--force"], capsys)
    assert code == 2 and err.count("\n") == 1
    assert "which comove did not write" in err
    assert ("notes.txt" if extra == "file" else "mine/") in err
    assert tree(out) == before


@pytest.mark.parametrize("flag", ["--force", "--merge"])
def test_a_folder_without_comoves_record_is_left_untouched(tmp_path, tracks_csv, capsys, flag):
    # a folder written by an older comove (no record of its files), or any user folder
    out = tmp_path / "res"
    assert run(["mine", tracks_csv, *QUICK, "--out", out], capsys)[0] == 0
    (out / MANIFEST).unlink()
    before = tree(out)
    code, _, err = run(["groups", tracks_csv, *QUICK, "--out", out, flag], capsys)
    assert code == 2 and err.count("\n") == 1
    assert "no record of what comove wrote there" in err
    assert "remove it yourself or choose another --out" in err
    assert tree(out) == before


def test_force_replaces_only_the_listed_files_and_keeps_the_folder(tmp_path, tracks_csv, capsys):
    out = tmp_path / "res"
    code, _, err = run(["mine", tracks_csv, "--radius", 2, "--replicates", 9, "--quiet",
                        "--out", out], capsys)  # fmt: skip
    assert code == 0, err
    assert (out / "significance.csv").is_file()
    out.chmod(0o751)
    inode = out.stat().st_ino
    old_run = (out / "run.json").read_text()
    code, _, err = run(["mine", tracks_csv, *QUICK, "--out", out, "--force"], capsys)
    assert code == 0, err
    assert stat.S_IMODE(out.stat().st_mode) == 0o751 and out.stat().st_ino == inode
    names = sorted(p.name for p in out.iterdir() if p.name != MANIFEST)
    assert "significance.csv" not in names  # listed by the earlier run, not written now
    assert read_manifest(out).files == {"mine": names}
    assert (out / "run.json").read_text() != old_run
    assert hidden(out) == [MANIFEST] and hidden(tmp_path) == []


def test_force_on_an_empty_folder_writes_into_it(tmp_path, tracks_csv, capsys):
    out = tmp_path / "res"
    out.mkdir(mode=0o750)
    code, _, err = run(["mine", tracks_csv, *QUICK, "--out", out, "--force"], capsys)
    assert code == 0, err
    assert stat.S_IMODE(out.stat().st_mode) == 0o750
    assert (out / "patterns.csv").is_file() and read_manifest(out).complete


def test_a_damaged_record_deletes_nothing(tmp_path):
    out = write_folder(tmp_path / "res", {"a.json": json_writer({"run": 1})})
    (tmp_path / "precious.txt").write_text("keep")
    (out / MANIFEST).write_text(json.dumps({"files": {"mine": ["../precious.txt", "a.json"]}}))
    with pytest.raises(InputError, match="record of this folder is damaged"):
        write_folder(out, {"a.json": json_writer({"run": 2})}, force=True)
    assert (tmp_path / "precious.txt").read_text() == "keep"
    assert json.loads((out / "a.json").read_text()) == {"run": 1}


# ---------------------------------------------------------------- --merge and the report


def test_merge_keeps_everything_it_did_not_write_and_removes_the_outdated_report(
    tmp_path, tracks_csv, capsys
):
    out = tmp_path / "res"
    assert run(["mine", tracks_csv, *QUICK, "--out", out], capsys)[0] == 0
    assert run(["report", out, "--quiet"], capsys)[0] == 0
    figures = sorted(p.name for p in (out / "figures").iterdir())
    assert figures and read_manifest(out).files[REPORT]
    (out / "figures" / "mine.svg").write_text("<svg/>")
    (out / "notes").mkdir()
    (out / "notes" / "todo.txt").write_text("check the cat")
    code, out_text, err = run(["groups", tracks_csv, "--radius", 2, "--replicates", 0,
                               "--out", out, "--merge"], capsys)  # fmt: skip
    assert code == 0, err
    assert "report of the folder's earlier results was removed" in out_text
    # the user's files stay; the report of the mine results alone is gone
    assert (out / "figures" / "mine.svg").read_text() == "<svg/>"
    assert (out / "notes" / "todo.txt").read_text() == "check the cat"
    assert not (out / "report.html").exists()
    assert sorted(p.name for p in (out / "figures").iterdir()) == ["mine.svg"]
    record = read_manifest(out)
    assert set(record.files) == {"mine", "groups"} and record.complete
    # a new report covers both commands and keeps the user's figure
    assert run(["report", out, "--quiet"], capsys)[0] == 0
    assert "comove mine and comove groups" in (out / "report.html").read_text()
    assert (out / "figures" / "mine.svg").read_text() == "<svg/>"
    assert hidden(out) == [MANIFEST] and hidden(tmp_path) == []


def test_merge_removes_an_emptied_figures_folder(tmp_path, tracks_csv, capsys):
    out = tmp_path / "res"
    assert run(["mine", tracks_csv, *QUICK, "--out", out], capsys)[0] == 0
    assert run(["report", out, "--quiet"], capsys)[0] == 0
    assert run(["groups", tracks_csv, *QUICK, "--out", out, "--merge"], capsys)[0] == 0
    assert not (out / "figures").exists() and not (out / "report.html").exists()
    assert REPORT not in read_manifest(out).files


def test_report_does_not_replace_a_report_comove_did_not_write(tmp_path, tracks_csv, capsys):
    out = tmp_path / "res"
    assert run(["mine", tracks_csv, *QUICK, "--out", out], capsys)[0] == 0
    (out / "report.html").write_text("my own report")
    code, _, err = run(["report", out], capsys)
    assert code == 2 and "report.html, which comove did not write" in err
    assert (out / "report.html").read_text() == "my own report"
    assert not (out / "figures").exists()


def test_report_in_an_older_comoves_folder_replaces_only_its_own_files(
    tmp_path, tracks_csv, capsys
):
    out = tmp_path / "res"
    assert run(["mine", tracks_csv, *QUICK, "--out", out], capsys)[0] == 0
    (out / MANIFEST).unlink()  # as an older comove left it, with an older report
    (out / "figures").mkdir()
    (out / "figures" / "cross_l.png").write_bytes(b"old figure")
    (out / "figures" / "sketch.png").write_bytes(b"the user's")
    (out / "report.html").write_text("old report")
    assert run(["report", out, "--quiet"], capsys)[0] == 0
    assert (out / "report.html").read_text().startswith("<!DOCTYPE html>")
    names = {p.name for p in (out / "figures").iterdir()}
    assert "cross_l.png" not in names  # the older report's figure, not drawn now
    assert (out / "figures" / "sketch.png").read_bytes() == b"the user's"
    assert not (out / MANIFEST).exists() and hidden(out) == []


def test_a_folder_cut_off_mid_write_is_refused_until_replaced(tmp_path):
    out = write_folder(tmp_path / "res", {"patterns.csv": text_writer("roles\n")})
    record = read_manifest(out)
    record.complete = False
    (out / MANIFEST).write_text(record.text())
    with pytest.raises(InputError, match="cut off while writing it"):
        open_results(out)
    with pytest.raises(InputError, match="cut off while writing it; add --force"):
        write_folder(out, {"patterns.csv": text_writer("roles\n")}, merge="mine")
    write_folder(out, {"patterns.csv": text_writer("roles\na;b\n")}, force=True)
    assert open_results(out).table("patterns.csv")["roles"].tolist() == ["a;b"]


def test_a_failure_while_moving_files_into_place_restores_the_folder(tmp_path, monkeypatch):
    out = write_folder(tmp_path / "res", {f"{k}.json": json_writer({"run": 1}) for k in "abc"})
    before = tree(out)
    real, calls = os.replace, []

    def flaky(src, dst):
        calls.append(dst)
        if len(calls) == 4:  # the record (1) and two files (2, 3) are already in place
            raise OSError("disk full")
        real(src, dst)

    monkeypatch.setattr(os, "replace", flaky)
    files = {f"{k}.json": json_writer({"run": 2}) for k in "abcd"}
    with pytest.raises(OSError, match="disk full"):
        write_folder(out, files, force=True)
    monkeypatch.undo()
    assert tree(out) == before
    assert hidden(out) == [MANIFEST] and hidden(tmp_path) == []


# ---------------------------------------------------------------- one writer at a time

HOLDER = """
    import sys
    from comove.io.results import claim

    with claim(sys.argv[1], command="mine", force=True):
        print("held", flush=True)
        sys.stdin.readline()
"""


@pytest.mark.parametrize("exists", [False, True])
def test_a_second_writer_fails_at_once_naming_the_first(tmp_path, tracks_csv, capsys, exists):
    out = tmp_path / "res"
    if exists:
        assert run(["mine", tracks_csv, *QUICK, "--out", out], capsys)[0] == 0
    holder = python(HOLDER, out)
    try:
        assert holder.stdout.readline().strip() == "held"
        # the input does not exist: the folder is claimed before anything is read
        absent = tmp_path / "absent.csv"
        code, _, err = run(["mine", absent, *QUICK, "--out", out, "--force"], capsys)
        assert code == 2 and err.count("\n") == 1
        assert f"another comove run (PID {holder.pid}) is writing it" in err
        with pytest.raises(InputError, match=f"PID {holder.pid}"):
            write_folder(out, {"a.json": json_writer({})}, force=True)
    finally:
        holder.communicate("\n")
    assert holder.returncode == 0, holder.stderr
    code, _, err = run(["mine", tracks_csv, *QUICK, "--out", out, "--force"], capsys)
    assert code == 0, err
    assert hidden(tmp_path) == [] and hidden(out) == [MANIFEST]


def test_a_claim_in_this_process_is_also_exclusive(tmp_path):
    with claim(tmp_path / "res", command="mine") as held:
        with pytest.raises(InputError, match=f"PID {os.getpid()}"), claim(tmp_path / "res"):
            pass
        # a write within the claim uses it (the same folder, however named)
        write_folder(tmp_path / "x" / ".." / "res", {"a.json": json_writer({"command": "mine"})})
        assert held.committed
    assert read_manifest(tmp_path / "res").files == {"mine": ["a.json"]}


@pytest.mark.parametrize("exists", [False, True])
def test_the_lock_of_a_killed_run_is_taken_over(tmp_path, tracks_csv, capsys, exists):
    out = tmp_path / "res"
    if exists:
        assert run(["mine", tracks_csv, *QUICK, "--out", out], capsys)[0] == 0
    holder = python(HOLDER, out)
    assert holder.stdout.readline().strip() == "held"
    holder.kill()
    holder.communicate()
    assert hidden(out if exists else tmp_path)  # its lock is left behind
    code, _, err = run(["mine", tracks_csv, *QUICK, "--out", out, "--force"], capsys)
    assert code == 0, err
    assert hidden(tmp_path) == [] and hidden(out) == [MANIFEST]


# ---------------------------------------------------------------- signals and crashes

SLOW_WRITE = """
    import sys, time
    from comove.io.results import json_writer, write_folder

    def slow(path):
        path.write_text("half")
        print("writing", flush=True)
        time.sleep(60)

    write_folder(sys.argv[1], {"a.json": json_writer({"run": 2}), "b.txt": slow}, force=True)
"""


@pytest.mark.parametrize("exists", [False, True])
def test_a_run_killed_mid_write_is_cleaned_up_by_the_next(tmp_path, exists):
    out = tmp_path / "res"
    if exists:
        write_folder(out, {"a.json": json_writer({"run": 1})})
        record = (out / MANIFEST).read_text()
    writer = python(SLOW_WRITE, out)
    assert writer.stdout.readline().strip() == "writing"
    writer.kill()
    writer.communicate()
    # its staging folder and lock are left (inside an existing folder, beside a new one)
    assert len(hidden(out if exists else tmp_path)) == (3 if exists else 2)
    if exists:
        assert json.loads((out / "a.json").read_text()) == {"run": 1}
        assert (out / MANIFEST).read_text() == record
        assert sorted(p.name for p in out.iterdir() if not p.name.startswith(".")) == ["a.json"]
    else:
        assert not out.exists()
    write_folder(out, {"a.json": json_writer({"run": 3})}, force=True)
    assert hidden(tmp_path) == [] and hidden(out) == [MANIFEST]
    assert json.loads((out / "a.json").read_text()) == {"run": 3}


def test_signals_are_held_while_files_change_places():
    caught = []
    old = signal.signal(signal.SIGTERM, lambda n, _f: caught.append(("handler", n)))
    try:
        with results._signals_held():
            os.kill(os.getpid(), signal.SIGTERM)
            time.sleep(0.1)  # the handler would run here if the signal were not held
            caught.append(("step", "done"))
        for _ in range(500):  # delivered after the step (maybe by another thread)
            if len(caught) > 1:
                break
            time.sleep(0.01)
    finally:
        signal.signal(signal.SIGTERM, old)
    assert caught == [("step", "done"), ("handler", signal.SIGTERM)]


def game_args():
    source, options = mine_options("small_sided_game")
    flags = [x for k, v in options.items() for x in (f"--{k.replace('_', '-')}", str(v))]
    return ["mine", source, *flags, "--replicates", "199", "--jobs", "2", "--quiet"]


@pytest.mark.parametrize(
    ("signum", "status", "words"),
    [(signal.SIGTERM, 143, "stopped by SIGTERM"), (signal.SIGHUP, 129, "stopped by SIGHUP"),
     (signal.SIGINT, 130, "interrupted")],
)  # fmt: skip
def test_a_signal_stops_a_real_run_leaving_nothing(tmp_path, signum, status, words):
    out = tmp_path / "res"
    run_ = subprocess.Popen(
        [sys.executable, "-m", "comove.cli", *game_args(), "--out", str(out)],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
    )  # fmt: skip
    proc = psutil.Process(run_.pid)
    while len(proc.children()) < 2 and run_.poll() is None:  # the null replicates' workers
        time.sleep(0.05)
    children = proc.children(recursive=True)
    assert len(children) >= 2, "the run ended before its workers started"
    run_.send_signal(signum)
    _, err = run_.communicate(timeout=120)
    assert run_.returncode == status
    assert err == f"comove mine: {words}; nothing was written\n"
    _, alive = psutil.wait_procs(children, timeout=10)
    assert alive == []
    assert not out.exists() and hidden(tmp_path) == []


SLOW_CSV = """
    import sys, time
    import comove.pipeline.core as pipeline
    from comove.cli import main

    real = pipeline.csv_writer

    def slow_csv(frame):
        write = real(frame)

        def slow(path):
            write(path)
            print("writing", flush=True)
            for _ in range(40):
                time.sleep(0.05)

        return slow

    pipeline.csv_writer = slow_csv
    sys.exit(main(sys.argv[1:]))
"""


def test_sigterm_while_writing_leaves_the_folder_as_it_was(tmp_path, tracks_csv, capsys):
    out = tmp_path / "res"
    assert run(["mine", tracks_csv, *QUICK, "--out", out], capsys)[0] == 0
    before = tree(out)
    writer = python(SLOW_CSV, "mine", tracks_csv, *QUICK, "--out", out, "--force")
    # writers run side by side: two may print on one line ("writingwriting")
    assert writer.stdout.readline().strip().startswith("writing")
    writer.send_signal(signal.SIGTERM)
    _, err = writer.communicate(timeout=60)
    assert writer.returncode == 143
    assert err == "comove mine: stopped by SIGTERM; nothing was written\n"
    assert tree(out) == before
    assert hidden(tmp_path) == [] and hidden(out) == [MANIFEST]
