"""The HTML report of a results folder: sections, figures, escaping, size and atomicity."""

from __future__ import annotations

import base64
import json
import os
import re
from html.parser import HTMLParser

import matplotlib.image as mpimg
import numpy as np
import pandas as pd
import pytest
from scenes import planted_leads

from comove.errors import InputError
from comove.io.results import MANIFEST
from comove.io.scenarios import mine_options
from comove.pipeline.core import groups, mine
from comove.present import figures
from comove.present.report import build_report

GROUP_KEYS = ("id", "time", "x", "y", "lon", "lat", "role", "step", "max_gap", "max_speed",
              "radius")  # fmt: skip

RUN = "The run"
PATTERNS = "Durable role sets, ranked"
MAP = "Map of the tracks"
TIMELINE = "Timeline of episodes"
DYADS = "Dyad association"
LEADERS = "Who leads whom"
CROSS = "Cross-L curves of role pairs"


class Page(HTMLParser):
    """Collects the tags, headings, images and text of a report."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[str] = []
        self.h2: list[str] = []
        self.images: list[dict[str, str]] = []
        self.text: list[str] = []
        self.captions: list[str] = []
        self._in_h2 = False
        self._in_caption = False

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append(tag)
        if tag == "img":
            self.images.append({k: v or "" for k, v in attrs})
        self._in_h2 = tag == "h2"
        if tag == "figcaption":
            self._in_caption = True
            self.captions.append("")

    def handle_endtag(self, tag: str) -> None:
        if tag == "h2":
            self._in_h2 = False
        if tag == "figcaption":
            self._in_caption = False

    def handle_data(self, data: str) -> None:
        self.text.append(data)
        if self._in_h2:
            self.h2.append(data.strip())
        if self._in_caption:
            self.captions[-1] += data

    def all_text(self) -> str:
        return "".join(self.text)


def parse(report) -> Page:
    page = Page()
    page.feed(report.read_text(encoding="utf-8"))
    return page


def image_data(img: dict[str, str]) -> bytes:
    prefix = "data:image/png;base64,"
    assert img["src"].startswith(prefix)
    return base64.b64decode(img["src"][len(prefix) :])


def scenario_folder(root, name: str, k_radii: str | None = None):
    source, options = mine_options(name)
    folder = root / name
    extra = {"k_radii": k_radii} if k_radii else {}
    mine(source, replicates=19, **options, **extra).write(folder)
    gopts = {k: v for k, v in options.items() if k in GROUP_KEYS}
    groups(source, replicates=0, **gopts).write(folder, merge=True)
    return folder


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    root = tmp_path_factory.mktemp("reports")
    out = {}
    for name, radii in (("small_sided_game", "1:9:2"), ("fleet", None), ("herd", None)):
        folder = scenario_folder(root, name, radii)
        out[name] = (folder, build_report(folder))
    return out


def expected_sections(folder) -> list[str]:
    names = {p.name for p in folder.iterdir()}
    sections = [RUN]
    if "patterns.csv" in names:
        sections.append(PATTERNS)
    if {"track_sample.parquet", "episode_paths.parquet"} & names:
        sections.append(MAP)
    if "episodes.csv" in names:
        sections.append(TIMELINE)
    if "dyads.csv" in names:
        sections.append(DYADS)
    if "leadership.csv" in names:
        sections.append(LEADERS)
    if "cross_k.csv" in names:
        sections.append(CROSS)
    return sections


def check_report(folder, report, figure_names: set[str]) -> Page:
    assert report == folder / "report.html"
    page = parse(report)
    assert "script" not in page.tags
    assert page.h2 == expected_sections(folder)
    leaders = folder / "leadership.csv"
    if leaders.is_file() and pd.read_csv(leaders)["clear_leader"].any():
        figure_names = figure_names | {"leadership"}  # drawn when some pair has a clear leader
    assert len(page.images) == len(figure_names)
    files = {p.stem: p for p in (folder / "figures").iterdir()}
    assert set(files) == figure_names
    by_bytes = {f.read_bytes(): f for f in files.values()}
    for img in page.images:
        data = image_data(img)
        assert data in by_bytes  # the embedded image is the file in figures/
        pixels = mpimg.imread(by_bytes[data])
        assert pixels.shape[:2] == (int(img["height"]), int(img["width"]))
        assert int(img["width"]) == round(figures.WIDTH_IN * figures.DPI) == 800
        assert 200 <= int(img["height"]) <= 1200  # moderate size, whatever the data
    text = page.all_text()
    assert "personal data" in text and "not interaction or cause" in text
    assert "real-time safety" in text
    hidden = [p.name for p in folder.iterdir() if p.name.startswith(".")]
    assert hidden == [MANIFEST]  # the folder's record, and no leftovers
    return page


ALL_FIGURES = {
    "patterns_pi",
    "track_map",
    "episode_timeline",
    "dyad_matrix",
    "association_network",
}


def test_game_report_has_every_section(built):
    folder, report = built["small_sided_game"]
    page = check_report(folder, report, ALL_FIGURES | {"cross_l"})
    text = page.all_text()
    assert "amber_back;teal_forward" in text
    assert "comove mine" in text and "comove groups" in text
    assert "rows read" in text and "sampling interval" in text
    # the patterns table is ranked by time prevalence (planted 0.70 first, truth.json)
    assert text.index("amber_back;teal_forward") < text.index("amber_pivot;amber_winger")


@pytest.mark.parametrize("name", ["fleet", "herd"])
def test_lonlat_scenario_reports(built, name):
    folder, report = built[name]
    page = check_report(folder, report, ALL_FIGURES)
    assert "lonlat" in page.all_text()
    assert "missing coordinates" in page.all_text() or name == "herd"


def test_mine_only_and_groups_only_folders(tmp_path):
    source, options = mine_options("small_sided_game")
    mine(source, replicates=0, **options).write(tmp_path / "m")
    page = check_report(tmp_path / "m", build_report(tmp_path / "m"), {"patterns_pi", "track_map"})
    assert MAP in page.h2 and TIMELINE not in page.h2
    gopts = {k: v for k, v in options.items() if k in GROUP_KEYS}
    groups(source, replicates=0, **gopts).write(tmp_path / "g")
    page = check_report(tmp_path / "g", build_report(tmp_path / "g"),
                        ALL_FIGURES - {"patterns_pi"})  # fmt: skip
    assert PATTERNS not in page.h2


def test_leadership_section_draws_the_planted_leads(tmp_path):
    # the invented guide and its followers of tests/groups/test_leadership.py
    groups(planted_leads(), radius=3.0, step=0.1, links="snapshot", replicates=0,
           max_delay=2.0).write(tmp_path / "g")  # fmt: skip
    page = parse(build_report(tmp_path / "g"))
    assert LEADERS in page.h2
    assert (tmp_path / "g" / "figures" / "leadership.png").is_file()
    text = page.all_text()
    assert "guide → late12" not in text  # drawn in the figure, named in its alt text only
    assert "Leads by role pair" in text and "who turns first, not who causes the turn" in text


def test_tested_leads_carry_their_p_values_in_the_caption(tmp_path):
    groups(planted_leads(), radius=3.0, step=0.1, links="snapshot", replicates=19,
           max_delay=2.0, seed=3).write(tmp_path / "g")  # fmt: skip
    page = parse(build_report(tmp_path / "g"))
    captions = {img["alt"]: text for img, text in zip(page.images, page.captions, strict=True)}
    lead = next(text for alt, text in captions.items() if alt.startswith("Delays"))
    assert "swap of leader and follower" in lead and "faded bars" in lead


def test_periods_are_compared_in_a_heatmap_with_the_table_under_it(tmp_path):
    source, options = mine_options("small_sided_game")
    periods = tmp_path / "periods.csv"
    start = 1778925600  # the game's first time, epoch seconds (truth.json)
    periods.write_text(f"name,start,end\nfirst,{start},{start + 180}\n"
                       f"second,{start + 180},{start + 400}\n")  # fmt: skip
    mine(source, replicates=0, periods=str(periods), **options).write(tmp_path / "m")
    page = parse(build_report(tmp_path / "m"))
    assert "By period and area" in page.h2
    assert (tmp_path / "m" / "figures" / "parts_roles.png").is_file()
    captions = {img["alt"]: text for img, text in zip(page.images, page.captions, strict=True)}
    heat = next(text for alt, text in captions.items() if "each period and area" in alt)
    assert "Blank: not kept in that part" in heat
    text = page.all_text()
    assert "first / all" in text and "second / all" in text


def test_part_heatmap_draws_one_cell_per_set_and_part_and_leaves_missing_ones_blank():
    matrix = pd.DataFrame([[0.7, 0.6, np.nan], [0.2, np.nan, 0.9]], index=["a, b", "a, c"],
                          columns=["all / all", "day / all", "night / all"])  # fmt: skip
    fig, note = figures.part_heatmap(matrix, "durable role sets")
    ax = fig.axes[0]
    drawn = ax.images[0].get_array()
    assert drawn.shape == (2, 3) and drawn.mask.tolist() == [
        [False, False, True],
        [False, True, False],
    ]
    assert sorted(t.get_text() for t in ax.texts) == ["0.20", "0.60", "0.70", "0.90"]
    assert [t.get_text() for t in ax.get_xticklabels()] == list(matrix.columns)
    assert "Blank" in note


def test_captions_say_only_what_the_figures_show(tmp_path):
    # a mine folder without tests: no episode paths on the map, no envelope on the
    # cross-L curves; times, durations and role sets written as in the tables
    source, options = mine_options("small_sided_game")
    mine(source, replicates=0, k_radii="1,3", **options).write(tmp_path / "m")
    page = parse(build_report(tmp_path / "m"))
    captions = {img["alt"]: text for img, text in zip(page.images, page.captions, strict=True)}
    track_map = next(text for alt, text in captions.items() if alt.startswith("Map"))
    assert "episode" not in track_map
    cross = next(text for alt, text in captions.items() if alt.startswith("Cross-L"))
    assert "no envelope" in cross and "band" not in cross
    text = page.all_text()
    assert re.search(r"\d{4}-\d\d-\d\dT\d\d:\d\d:[\d.]+Z", text)  # ISO 8601, as in the files
    assert " UTC<" not in text and "+00:00" not in text
    assert " + " not in text  # role sets joined by ';' as in the files
    assert "1 h 59 min" not in text


NASTY_ROLE = '<b>x</b>&"'
NASTY_ID = "<i>o1</i>"


def nasty_scene() -> pd.DataFrame:
    """Three objects walking in step along x for a minute; names full of HTML."""
    t = np.arange(0, 61)
    frames = []
    for obj, role, dy in ((NASTY_ID, NASTY_ROLE, 0.0), ("o2 & co", "$1 & $2", 1.0),
                          ("o3", "<script>alert(1)</script>", 2.0)):  # fmt: skip
        frames.append(pd.DataFrame({"id": obj, "time": t, "x": t * 1.2, "y": dy, "role": role}))
    return pd.concat(frames, ignore_index=True)


def test_names_with_html_are_escaped(tmp_path):
    scene = nasty_scene()
    folder = tmp_path / "nasty"
    mine(scene, radius=2.5, step=1.0, replicates=0).write(folder)
    groups(scene, radius=2.5, step=1.0, replicates=0).write(folder, merge=True)
    report = build_report(folder)
    raw = report.read_text(encoding="utf-8")
    page = parse(report)
    assert "script" not in page.tags and "b" not in page.tags and "i" not in page.tags
    text = page.all_text()
    assert NASTY_ROLE in text and NASTY_ID in text and "<script>alert(1)</script>" in text
    assert html_escaped(NASTY_ROLE) in raw and NASTY_ROLE not in raw
    assert "$1 & $2" in text  # dollar signs drawn as text, not mathtext (which would fail)
    assert {p.stem for p in (folder / "figures").iterdir()} == ALL_FIGURES


def test_hidden_characters_are_shown_and_long_names_cut(tmp_path):
    # a right-to-left override could make "gnp.exe" read "exe.png"; a bell or escape
    # character shows nothing; a name of 300 characters would swamp the tables
    spoof, long_role = "ab\u202egnp.exe\x07", "r" * 300
    t = np.arange(0, 61)
    scene = pd.concat([
        pd.DataFrame({"id": spoof, "time": t, "x": t * 1.2, "y": 0.0, "role": long_role}),
        pd.DataFrame({"id": "o2", "time": t, "x": t * 1.2, "y": 1.0, "role": "s"}),
    ], ignore_index=True)  # fmt: skip
    folder = tmp_path / "hidden"
    groups(scene, radius=2.5, step=1.0, replicates=0).write(folder)
    mine(scene, radius=2.5, step=1.0, replicates=0).write(folder, merge=True)
    raw = build_report(folder).read_text(encoding="utf-8")
    assert "\u202e" not in raw and "\x07" not in raw
    assert "ab&lt;U+202E&gt;gnp.exe&lt;U+0007&gt;" in raw
    assert f'title="{long_role};s"' in raw  # the whole name in the tooltip
    assert long_role + ";s<" not in raw  # and cut where shown


def html_escaped(text: str) -> str:
    return (
        text.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;").replace('"', "&quot;")
    )


def large_folder(root, n: int = 1_000_000):
    """A synthetic results folder with ~1 M series rows and ~1 M sampled positions."""
    folder = root / "large"
    folder.mkdir()
    start = pd.Timestamp("2026-03-01T00:00:00Z")
    snaps = n // 2
    times = start + pd.to_timedelta(np.arange(snaps), unit="s")
    rng = np.random.default_rng(7)
    pi = np.clip(0.5 + 0.4 * np.sin(np.arange(snaps) / 5000.0) + rng.normal(0, 0.05, snaps), 0, 1)
    series = pd.DataFrame({
        "roles": pd.Categorical(np.repeat(["alpha;beta", "beta;gamma"], snaps)),
        "time": np.tile(times, 2),
        "participation_index": np.concatenate([pi, pi[::-1]]).astype("float32"),
        "prevalent": np.concatenate([pi, pi[::-1]]) >= 0.5,
    })  # fmt: skip
    # the file's name before it was spelled out: the report reads such older folders too
    series.to_parquet(folder / "pi_series.parquet", index=False)
    pd.DataFrame({
        "roles": ["alpha;beta", "beta;gamma"], "size": 2, "present_snapshots": snaps,
        "prevalent_snapshots": [int((pi >= 0.5).sum())] * 2, "time_prevalence": [0.6, 0.5],
        "prevalent_s": 1.0, "longest_run_s": 1.0,
        "longest_run_start": "2026-03-01T00:00:00.000000Z", "mean_participation_index": 0.5,
    }).to_csv(folder / "patterns.csv", index=False)  # fmt: skip
    objects = np.repeat(np.arange(100), n // 100)
    sample = pd.DataFrame({
        "object": pd.Categorical([f"o{i}" for i in objects]),
        "role": "alpha",
        "time": start + pd.to_timedelta(np.tile(np.arange(n // 100), 100) * 3, unit="s"),
        "x": rng.normal(0, 500, n), "y": rng.normal(0, 300, n),
    })  # fmt: skip
    sample.attrs["every"] = 3
    sample.to_parquet(folder / "track_sample.parquet", index=False)
    quality = {"rows_read": 3 * n, "rows_kept": 3 * n, "dropped": {},
               "time_start": "2026-03-01T00:00:00Z", "time_end": str(times[-1]),
               "coordinates": {"input": "planar"}, "alignment": {"step_s": 1.0}}  # fmt: skip
    (folder / "quality.json").write_text(json.dumps(quality))
    run = {"command": "mine", "input": ["big.parquet"],
           "settings": {"ColocationParams": {"min_participation": 0.5}}}  # fmt: skip
    (folder / "run.json").write_text(json.dumps(run))
    return folder


def test_large_input_gives_a_small_report_that_says_it_was_downsampled(tmp_path):
    folder = large_folder(tmp_path)
    report = build_report(folder, max_points=20_000)
    assert report.stat().st_size < 3_000_000
    page = parse(report)
    assert page.h2 == [RUN, PATTERNS, MAP]
    text = page.all_text()
    assert "Downsampled for drawing: 1,000,000 snapshot values" in text
    assert "Positions thinned for drawing: 20,000 of 1,000,000" in text
    assert "holds 1 snapshot in 3" in text


def test_bin_series_matches_a_direct_groupby():
    rng = np.random.default_rng(3)
    step = 10**9
    t = np.sort(rng.choice(100_000, 30_000, replace=False)).astype("int64") * step
    v = rng.random(len(t))
    flag = v > 0.9
    out = figures.bin_series(t, v, flag, 0, 99_999 * step, step, max_bins=500)
    assert len(out["mean"]) <= 500 and out["downsampled"]
    # reference: the same bins through pandas groupby
    bins = t // out["width"]
    ref = (
        pd.DataFrame({"b": bins, "v": v, "f": flag})
        .groupby("b")
        .agg(mean=("v", "mean"), high=("v", "max"), low=("v", "min"), any=("f", "any"))
    )
    assert np.allclose(out["mean"][ref.index], ref["mean"])
    assert np.allclose(out["high"][ref.index], ref["high"])
    assert np.allclose(out["low"][ref.index], ref["low"])
    assert np.array_equal(out["any"][ref.index], ref["any"].to_numpy())
    assert np.isnan(out["mean"][np.setdiff1d(np.arange(len(out["mean"])), ref.index)]).all()
    # short series: one snapshot per bin, nothing merged
    few = figures.bin_series(t[:50], v[:50], flag[:50], 0, int(t[49]), step)
    assert not few["downsampled"] and np.isfinite(few["mean"]).sum() == 50


def test_association_matrix_groups_blocks_and_is_symmetric():
    pairs = []
    names = ["a1", "b1", "a2", "b2", "a3", "b3"]
    for i, p in enumerate(names):
        for q in names[i + 1 :]:
            same = p[0] == q[0]
            pairs.append({"object_a": p, "object_b": q, "half_weight_index": 0.9 if same else 0.1})
    matrix, _ = figures.association_matrix(pd.DataFrame(pairs))
    order = [n[0] for n in matrix.index]
    assert order in (["a"] * 3 + ["b"] * 3, ["b"] * 3 + ["a"] * 3)
    m = matrix.to_numpy()
    assert np.isnan(np.diag(m)).all()
    assert np.allclose(np.nan_to_num(m), np.nan_to_num(m.T))


def test_lonlat_map_uses_equal_distance_aspect():
    lat = 60.0
    sample = pd.DataFrame({"x": [10.0, 10.1, 10.2], "y": [lat - 0.05, lat, lat + 0.05]})
    fig, _ = figures.track_map(sample, None, lonlat=True, max_points=10)
    # 1 / cos(60°) = 2: a degree of latitude drawn twice as long as one of longitude
    assert fig.axes[0].get_aspect() == pytest.approx(1 / np.cos(np.radians(lat)), rel=1e-3)


def test_missing_or_empty_folder_is_an_input_error(tmp_path):
    message = (
        "no comove results found (patterns.csv, episodes.csv, focal.csv or sweep.csv); run comove "
        "mine, groups, focal or sweep first"
    )
    for folder in (tmp_path / "absent", tmp_path):
        with pytest.raises(InputError) as err:
            build_report(folder)
        assert str(err.value) == f"{folder}: {message}"
        assert "\n" not in str(err.value)
    (tmp_path / "run.json").write_text("{}")
    with pytest.raises(InputError, match="no comove results found"):
        build_report(tmp_path)


def test_failed_write_keeps_the_previous_report(tmp_path, monkeypatch):
    source, options = mine_options("small_sided_game")
    folder = tmp_path / "m"
    mine(source, replicates=0, **options).write(folder)
    report = build_report(folder)
    before = report.read_bytes()
    figs_before = sorted((p.name, p.read_bytes()) for p in (folder / "figures").iterdir())
    (folder / "patterns.csv").write_text((folder / "patterns.csv").read_text()[:400])

    def boom(src, dst):
        raise OSError("disk full")

    monkeypatch.setattr(os, "replace", boom)
    with pytest.raises(OSError, match="disk full"):
        build_report(folder)
    monkeypatch.undo()
    assert report.read_bytes() == before
    assert sorted((p.name, p.read_bytes()) for p in (folder / "figures").iterdir()) == figs_before
    assert [p.name for p in folder.iterdir() if p.name.startswith(".")] == [MANIFEST]


def test_scale_bar_lengths_are_round_numbers():
    # common practice: scale bars of 1, 2 or 5 × 10^k
    assert figures._nice_length(7300.0) == 5000.0
    assert figures._nice_length(1999.0) == 1000.0
    assert figures._nice_length(0.3) == pytest.approx(0.2)
    assert figures._metres_text(5000.0) == "5 km" and figures._metres_text(20.0) == "20 m"
