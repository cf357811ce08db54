"""The association network: GraphML read back with networkx equals the dyad and object tables."""

from __future__ import annotations

import math

import networkx as nx
import numpy as np
import pandas as pd
import pytest
from scenes import one_record, run_scenario

from comove.io.results import graphml_writer
from comove.pipeline.core import groups


def same_value(read, expected) -> bool:
    if isinstance(expected, float) and math.isnan(expected):
        return isinstance(read, float) and math.isnan(read)
    return read == expected


def plain(value):
    """A table cell as GraphML gives it back: Python numbers, ISO text for times."""
    if isinstance(value, pd.Timestamp):
        return np.datetime_as_string(value.tz_convert(None).to_datetime64(), unit="us") + "Z"
    if isinstance(value, np.generic):
        return value.item()
    return value


@pytest.fixture(scope="module", params=["small_sided_game", "herd"])
def written(request, tmp_path_factory):
    _, result = run_scenario(request.param, replicates=9, seed=3)
    out = tmp_path_factory.mktemp("network") / request.param
    result.write(out)
    return result, out


def test_graphml_reads_back_with_networkx_as_the_tables(written):
    # networkx's GraphML reader is the outside reference for the file format
    result, out = written
    graph = nx.read_graphml(out / "association.graphml")
    dyads, objects = result.dyads, result.objects
    assert graph.number_of_edges() == len(dyads)
    assert graph.number_of_nodes() == len(objects) == one_record(out / "quality.json")["objects"]
    for row in objects.itertuples(index=False):
        data = graph.nodes[row.object]
        assert data == {"role": row.role, "present_snapshots": row.present_snapshots,
                        "present_s": row.present_s}  # fmt: skip
    assert "p_value" in dyads  # tests ran: their columns are edge attributes too
    for row in dyads.to_dict("records"):
        data = graph.edges[row.pop("object_a"), row.pop("object_b")]
        expected = {k: plain(v) for k, v in row.items() if not pd.isna(v) or isinstance(v, float)}
        assert set(data) == set(expected)
        for key, value in expected.items():
            assert same_value(data[key], value), key


def test_edge_list_is_the_dyads_with_their_half_weight_index(written):
    result, out = written
    edges = pd.read_csv(out / "association_edges.csv")
    assert list(edges.columns) == ["source", "target", "weight"]
    assert edges["source"].astype(str).tolist() == result.dyads["object_a"].tolist()
    assert edges["target"].astype(str).tolist() == result.dyads["object_b"].tolist()
    np.testing.assert_allclose(edges["weight"], result.dyads["half_weight_index"], rtol=1e-9)


def test_an_object_never_together_is_an_isolated_node(tmp_path):
    # a and b walk side by side; c walks alone far away
    t = np.arange(60.0)
    frame = pd.DataFrame({
        "id": np.repeat(["a", "b", "c"], t.size), "time": np.tile(t, 3),
        "x": np.concatenate([t, t, t]), "y": np.repeat([0.0, 1.0, 500.0], t.size),
        "role": np.repeat(["r", "r", "s"], t.size),
    })  # fmt: skip
    result = groups(frame, radius=2.0, step=1.0, replicates=0)
    result.write(tmp_path / "o")
    graph = nx.read_graphml(tmp_path / "o" / "association.graphml")
    assert sorted(graph.nodes) == ["a", "b", "c"] and list(graph.edges) == [("a", "b")]
    assert graph.degree("c") == 0 and graph.nodes["c"]["role"] == "s"
    assert graph.nodes["c"]["present_s"] == 60.0


def test_names_xml_cannot_hold_as_they_are_are_escaped(tmp_path):
    names = ["a&b", 'q"<x>', "it's", "c\x01d", "é😀"]
    nodes = pd.DataFrame({"object": names, "role": ["r<1>", None, "r", "r", "r"]})
    edges = pd.DataFrame({"object_a": names[:4], "object_b": names[1:],
                          "weight": [0.1, np.nan, 1 / 3, 1.0], "tested": [True, False, True, True],
                          "note": ["x & y", None, "", "z"]})  # fmt: skip
    graphml_writer(nodes, "object", edges, "object_a", "object_b")(tmp_path / "g.graphml")
    graph = nx.read_graphml(tmp_path / "g.graphml")
    shown = ["a&b", 'q"<x>', "it's", "c<U+0001>d", "é😀"]
    assert list(graph.nodes) == shown
    assert graph.nodes["a&b"] == {"role": "r<1>"} and graph.nodes['q"<x>'] == {}
    assert graph.edges["a&b", 'q"<x>'] == {"weight": 0.1, "tested": True, "note": "x & y"}
    second = graph.edges['q"<x>', "it's"]
    assert math.isnan(second["weight"]) and second["tested"] is False and "note" not in second
    assert graph.edges["it's", "c<U+0001>d"]["weight"] == 1 / 3
