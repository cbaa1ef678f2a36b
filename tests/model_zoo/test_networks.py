"""Model-file loaders: bundled networks, round trips, and one-line errors naming the file."""

from __future__ import annotations

import gzip

import numpy as np
import pytest

from model_zoo.base import Level, Size
from model_zoo.errors import InputError
from model_zoo.networks import bundled_networks, bundled_path, read_network

# nodes, arcs, free parameters, max in-degree: REFERENCES.md (recomputed from the files; nodes,
# arcs and in-degree agree with the bnlearn repository's published table).
COUNTS = {"asia": (8, 8, 18, 2), "child": (20, 25, 230, 2), "alarm": (37, 46, 509, 4),
          "insurance": (27, 52, 1008, 3)}


def _asia_text() -> str:
    with gzip.open(bundled_path("asia"), "rt") as fh:
        return fh.read()


def test_bundled_networks_are_listed_offline():
    """The networks shipped inside pgmpy's wheel are found without importing pgmpy."""
    names = bundled_networks()
    assert {"asia", "alarm", "child", "insurance", "win95pts"} <= set(names)
    assert names == sorted(names)


@pytest.mark.parametrize("name", sorted(COUNTS))
def test_bundled_network_counts_match_the_published_table(bn_family, load_bundled, name):
    """Nodes, arcs, free parameters and max in-degree as in REFERENCES.md; min-fill width of the
    moral graph as listed there (asia 2, child 3, alarm 4, insurance 7)."""
    inst = load_bundled(name)
    prof = bn_family.profile(inst)
    assert (prof["n_variables"], prof["n_edges"], prof["n_parameters"],
            prof["max_in_degree"]) == COUNTS[name]
    assert prof["treewidth_upper"] == {"asia": 2, "child": 3, "alarm": 4, "insurance": 7}[name]


def test_alarm_columns_off_by_1e7_are_accepted_and_renormalised(load_bundled):
    """PGMPY-NOTES: alarm's CPT columns are off from 1 by ~1e-7; the loader accepts them within
    1e-6 and renormalises, so every column then sums to 1 to rounding."""
    net = load_bundled("alarm").network
    worst = max(float(np.max(np.abs(net.cpts[v].sum(axis=0) - 1))) for v in net.variables)
    assert worst < 1e-12


@pytest.mark.parametrize("suffix", [".bif", ".xmlbif"])
def test_dump_and_load_round_trip_exactly(bn_family, tmp_path, suffix):
    """dump then load gives back the same graph, states and tables, and the same answers."""
    inst = bn_family.build(Size(9, 3), topology="grid", seed=4)
    path = tmp_path / f"grid{suffix}"
    bn_family.dump(inst, path)
    back = bn_family.load(path)
    a, b = inst.network, back.network
    assert set(a.variables) == set(b.variables)
    for v in a.variables:
        assert a.parents[v] == b.parents[v] and a.states[v] == b.states[v]
        np.testing.assert_allclose(a.cpts[v], b.cpts[v], rtol=0, atol=1e-15)
    for q in bn_family.queries(inst, Level.ASSOCIATIONAL, n=10, seed=1):
        assert bn_family.answer(back, q, method="exact").value == pytest.approx(
            bn_family.answer(inst, q, method="exact").value, abs=1e-14)


def test_bif_gz_files_load(tmp_path, bn_family):
    """A gzip-compressed BIF file on disk loads like the bundled ones."""
    path = tmp_path / "asia.bif.gz"
    with gzip.open(path, "wt") as fh:
        fh.write(_asia_text())
    assert bn_family.load(path).network.variables[0] == "asia"


def test_uai_files_load_with_generated_names(tmp_path, bn_family, confounded):
    """UAI files load through pgmpy's reader; variables are renamed var_0, var_1, ... and the
    answers survive (pgmpy's UAIReader drops names)."""
    from pgmpy.readwrite import UAIWriter

    from model_zoo.networks import to_pgmpy

    path = tmp_path / "conf.uai"
    UAIWriter(to_pgmpy(confounded.network)).write(str(path))
    back = bn_family.load(path)
    assert len(back.network.variables) == 3
    assert all(v.startswith("var_") for v in back.network.variables)


def _one_line(exc: pytest.ExceptionInfo) -> str:
    text = str(exc.value)
    assert "\n" not in text, text
    return text


def test_truncated_bif_names_the_file_and_line(tmp_path):
    """A BIF file cut off in the middle of a block: one line naming the file and the line of the
    block that never closes."""
    text = _asia_text()
    path = tmp_path / "cut.bif"
    path.write_text(text[: text.index("probability ( dysp") + 40])
    with pytest.raises(InputError) as exc:
        read_network(path)
    msg = _one_line(exc)
    assert str(path) in msg and "line" in msg and "truncated" in msg


def test_garbage_bif_names_the_file(tmp_path):
    """Text that is not BIF at all is an InputError naming the file."""
    path = tmp_path / "junk.bif"
    path.write_text("variable x { type discrete [ two ] { a b } }\nprobability ( x ) { table ; }\n")
    with pytest.raises(InputError) as exc:
        read_network(path)
    assert str(path) in _one_line(exc)


def test_non_normalised_cpt_names_file_variable_and_sum(tmp_path):
    """A CPT column summing to 0.98: the message names file, line, variable and the sum."""
    text = _asia_text().replace("table 0.01, 0.99;", "table 0.01, 0.97;")
    path = tmp_path / "bad.bif"
    path.write_text(text)
    with pytest.raises(InputError) as exc:
        read_network(path)
    msg = _one_line(exc)
    assert str(path) in msg and "'asia'" in msg and "0.98" in msg and "line" in msg


def test_cyclic_network_names_the_file_and_the_cycle(tmp_path):
    """A BIF file whose graph has a cycle: InputError naming the file and the cycle."""
    path = tmp_path / "cycle.bif"
    path.write_text("""network c {
}
variable A {
  type discrete [ 2 ] { y, n };
}
variable B {
  type discrete [ 2 ] { y, n };
}
probability ( A | B ) {
  (y) 0.5, 0.5;
  (n) 0.5, 0.5;
}
probability ( B | A ) {
  (y) 0.5, 0.5;
  (n) 0.5, 0.5;
}
""")
    with pytest.raises(InputError) as exc:
        read_network(path)
    msg = _one_line(exc)
    assert str(path) in msg and "cycle" in msg and "A" in msg and "B" in msg


def test_missing_table_missing_file_and_bad_suffix(tmp_path):
    """No table for a declared variable, no such file, an unknown suffix, an unknown bundled
    name: each an InputError naming what was asked for."""
    text = _asia_text()
    start = text.index("probability ( dysp")
    path = tmp_path / "short.bif"
    path.write_text(text[:start])
    with pytest.raises(InputError, match="'dysp' has no probability table"):
        read_network(path)
    with pytest.raises(InputError, match="nope.bif: no such file"):
        read_network(tmp_path / "nope.bif")
    other = tmp_path / "model.txt"
    other.write_text("x")
    with pytest.raises(InputError, match="model.txt"):
        read_network(other)
    with pytest.raises(InputError, match="bundled networks"):
        read_network("no_such_network")


def test_corrupt_xmlbif_names_the_file(tmp_path):
    """A broken XMLBIF file is an InputError naming it."""
    path = tmp_path / "bad.xmlbif"
    path.write_text("<BIF><NETWORK><NAME>x</NAME><VARIABLE>")
    with pytest.raises(InputError) as exc:
        read_network(path)
    assert str(path) in _one_line(exc)
