"""The report files: contract columns and keys, one self-contained page, and escaping.

A hostile name (``<script>alert(1)</script>``) is planted wherever a model or a person can put
text that reaches the report — a family name, the mechanism knob, a point's message, a
structural-profile key, the study description, the environment — and the parsed page must show
it as text, never as an element.
"""

from __future__ import annotations

import base64
import csv
import json
from dataclasses import replace
from html.parser import HTMLParser

import pytest

from tests.profiler.synthetic_study import make_curve, make_study

from profiler.fitter import Verdict
from profiler.report import (CAUTION, POINT_COLUMNS, SCHEMA, results_json, verdict_rows,
                             write_report)

HOSTILE = "<script>alert(1)</script>"
SIZES = (4, 6, 8, 12, 16, 24, 32, 48, 64)


def hostile_study():
    c0 = make_curve(0, law="power", param=1.0, sizes=SIZES, theory="polynomial")
    c1 = make_curve(1, family=HOSTILE, topology="grid", law="exp", param=1.8,
                    sizes=(2, 3, 4, 5, 6, 7, 8, 9, 10), statuses={10: "timeout"},
                    mechanism_knob=HOSTILE)
    c1 = replace(c1, points=tuple(replace(p, message=f"variable {HOSTILE} answered",
                                          profile={**p.profile, HOSTILE: 1.0})
                                  for p in c1.points))
    c2 = make_curve(2, axis="mechanism", fixed=8, law="power", param=2.0, sizes=SIZES,
                    statuses={24: "wrong"}, mechanism_knob="states per variable")
    study = make_study([c0, c1, c2], name="hostile-demo")
    spec = replace(study.spec, description=f"description with {HOSTILE}")
    return replace(study, spec=spec, environment={**study.environment, "cpu": HOSTILE})


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    from profiler.analysis import analyse_study

    out = tmp_path_factory.mktemp("report")
    study = hostile_study()
    analyses = analyse_study(study)
    files = write_report(study, out, analyses=analyses)
    return study, out, files, analyses


class _Page(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags: list[str] = []
        self.text: list[str] = []
        self.imgs: list[dict] = []
        self.links: list[str] = []
        self.attr_values: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        d = dict(attrs)
        self.attr_values.extend(v or "" for v in d.values())
        if tag == "img":
            self.imgs.append(d)
        if tag in ("link",) or (tag == "script"):
            self.links.append(tag)

    def handle_data(self, data):
        self.text.append(data)


def parse(html_text: str) -> _Page:
    page = _Page()
    page.feed(html_text)
    return page


def test_every_file_is_written(report):
    _, out, files, _ = report
    for name in ("index.html", "summary.md", "results.json", "points.csv",
                 "figures/curve_00.png", "figures/curve_01.png", "figures/curve_02.png",
                 "figures/compare_associational_graph.png",
                 "figures/compare_associational_mechanism.png"):
        assert (out / name).is_file(), name
        assert files[name] == out / name
    for png in (out / "figures").glob("*.png"):
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_hostile_names_are_escaped_in_the_page(report):
    """The planted name is text in the parsed page, and no script element exists."""
    _, out, _, _ = report
    source = (out / "index.html").read_text(encoding="utf-8")
    page = parse(source)
    assert "script" not in page.tags
    assert HOSTILE not in source
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in source
    text = "".join(page.text)
    assert text.count(HOSTILE) >= 3      # family in the table, the knob, the description, the cpu
    # In attributes (alt text) it arrives intact after unescaping: it was quoted, not cut.
    assert any(HOSTILE in v for v in page.attr_values)


def test_page_is_self_contained(report):
    """Every figure is embedded as a PNG data URI; nothing is fetched from elsewhere."""
    study, out, _, _ = report
    page = parse((out / "index.html").read_text(encoding="utf-8"))
    assert "link" not in page.tags and "script" not in page.tags
    srcs = [img["src"] for img in page.imgs]
    n_compare = len({(c.spec.level, c.spec.axis) for c in study.curves})
    assert len(srcs) == len(study.curves) + n_compare
    for src in srcs:
        assert src.startswith("data:image/png;base64,")
        assert base64.b64decode(src.split(",", 1)[1])[:4] == b"\x89PNG"


def test_page_has_its_sections_and_the_caution(report):
    _, out, _, _ = report
    source = (out / "index.html").read_text(encoding="utf-8")
    for section in ("question", "verdicts", "curves", "compare", "environment", "spec"):
        assert f'id="{section}"' in source
    assert CAUTION in source
    assert 'id="verdict-table"' in source
    # One table row per curve, each with its growth class named in words.
    page = parse(source)
    assert page.tags.count("tr") >= 3


def test_summary_markdown_has_the_table_the_caution_and_no_raw_html(report):
    study, out, _, _ = report
    md = (out / "summary.md").read_text(encoding="utf-8")
    assert CAUTION in md
    assert HOSTILE not in md
    rows = [line for line in md.splitlines() if line.startswith("| ") and "/" in line]
    assert len(rows) == len(study.curves)
    assert "The mechanism axis grew: states per variable" in md


def test_points_csv_starts_with_the_contract_columns(report):
    study, out, _, _ = report
    with open(out / "points.csv", newline="", encoding="utf-8") as fh:
        reader = csv.DictReader(fh)
        header = reader.fieldnames
        rows = list(reader)
    assert tuple(header[:len(POINT_COLUMNS)]) == POINT_COLUMNS
    assert len(rows) == sum(len(c.points) for c in study.curves)
    assert {r["status"] for r in rows} == {"ok", "timeout", "wrong"}
    assert all(r["study"] == "hostile-demo" for r in rows)


def test_results_json_has_the_contract_keys_and_round_trips(report):
    """results.json: schema, study, environment, curves; verdicts rebuild with Verdict.from_dict."""
    study, out, _, _ = report
    doc = json.loads((out / "results.json").read_text(encoding="utf-8"))
    assert doc["schema"] == SCHEMA == 1
    assert {"schema", "study", "environment", "curves"} <= set(doc)
    assert doc["study"]["name"] == "hostile-demo"
    assert doc["environment"]["workers"] == study.workers
    assert len(doc["curves"]) == 3
    for c in doc["curves"]:
        for key in ("family", "level", "method", "axis", "topology", "fixed", "points",
                    "verdict", "mechanism_knob", "work_unit", "flags", "agreement"):
            assert key in c
        assert set(c["verdict"]) == {"work", "time", "predicted"}
    good = doc["curves"][0]["verdict"]["work"]
    for key in ("growth", "degree", "degree_ci", "base", "base_ci", "gamma", "gamma_ci",
                "confidence", "lambda", "next_sizes", "n_points"):
        assert key in good
    assert good["curve"] == study.curves[0].spec.key()
    again = Verdict.from_dict(good)
    assert again.growth == good["growth"] == "polynomial"
    assert again.degree == pytest.approx(good["degree"])
    wrong = doc["curves"][2]
    assert wrong["verdict"]["work"] is None and wrong["verdict"]["time"] is None
    assert any("wrong" in f for f in wrong["flags"])


def test_results_json_is_the_function_output(report):
    """results_json() is what write_report wrote (one source for the schema)."""
    study, out, _, analyses = report
    doc = json.loads((out / "results.json").read_text(encoding="utf-8"))
    assert results_json(study, analyses) == doc


def test_verdict_rows_for_the_terminal(report):
    study, _, _, analyses = report
    rows = verdict_rows(analyses)
    assert [r["curve"] for r in rows] == [c.spec.key() for c in study.curves]
    assert rows[0]["growth"].startswith("polynomial, n^")
    assert rows[2]["growth"] == "no verdict" and "wrong" in rows[2]["flags"]
    assert set(rows[0]) >= {"curve", "growth", "growth_time", "confidence", "agreement",
                            "flags"}


def test_report_from_a_real_store_round_trip(tmp_path):
    """Points written to the SQLite store and loaded back render the same report files."""
    from profiler.store import Store

    curve = make_curve(0, sizes=SIZES)
    spec = make_study([curve]).spec
    with Store(tmp_path / "s.sqlite") as store:
        sid = store.open_study(spec, {"python": "3.11"}, resume=False)
        for p in curve.points:
            store.add_point(replace(p, study=sid))
        loaded = store.load_study(sid)
    files = write_report(loaded, tmp_path / "out")
    doc = json.loads(files["results.json"].read_text(encoding="utf-8"))
    assert doc["curves"][0]["verdict"]["work"]["growth"] == "polynomial"
    assert len(doc["curves"][0]["points"]) == len(SIZES)


def test_out_dir_that_is_a_file_is_bad_input(tmp_path):
    from profiler.errors import InputError

    target = tmp_path / "not-a-folder"
    target.write_text("x")
    with pytest.raises(InputError, match="not-a-folder"):
        write_report(make_study([make_curve(0, sizes=(4, 8))]), target)
