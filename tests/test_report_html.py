"""The HTML report: well-formed, self-contained, escaped, and its charts match the result.

The roofline checks follow the roofline model (Williams, Waterman & Patterson,
"Roofline: an insightful visual performance model", CACM 52(4), 2009):
attainable FLOP/s = min(peak FLOP/s, arithmetic intensity x DRAM bytes/s), the
ridge point at peak / bandwidth. Well-formedness of the inline SVG is checked
with an XML parser (inline SVG must be XML, W3C SVG 1.1).
"""

from __future__ import annotations

import base64
import hashlib
import re
import sys
import xml.etree.ElementTree as ET
from dataclasses import replace
from html.parser import HTMLParser
from pathlib import Path

import pytest

from gate.report import all_reporters, charts, html_layers
from gate.report.html import REPORTER, render
from gate.report.text import html_escape
from gate.result import (
    FAIL,
    PASS,
    Entry,
    GateResult,
    ModelError,
    UngatedModel,
    blocking_lines,
    not_gated_sentence,
)
from gate.units import fmt_joules
from tests.reportkit import (
    DRAM_BYTES_PER_S,
    HOSTILE,
    PEAK_FLOPS_PER_S,
    cnn_layers,
    demo_result,
    make_layer,
    make_run,
    make_verdict,
)

SVG_NS = "{http://www.w3.org/2000/svg}"
XLINK_HREF = "{http://www.w3.org/1999/xlink}href"
VOID = {"meta", "br", "img", "input", "link", "hr", "wbr", "col", "area", "base", "source"}


class _Tree(HTMLParser):
    """Checks every element is closed in order and collects tags, attributes and text."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.stack: list[str] = []
        self.elements: list[tuple[str, dict[str, str | None]]] = []
        self.text: list[str] = []
        self.problems: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.elements.append((tag, dict(attrs)))
        if tag not in VOID:
            self.stack.append(tag)

    def handle_startendtag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.elements.append((tag, dict(attrs)))

    def handle_endtag(self, tag: str) -> None:
        if not self.stack or self.stack[-1] != tag:
            self.problems.append(f"</{tag}> closes {self.stack[-1:] or 'nothing'}")
        else:
            self.stack.pop()

    def handle_data(self, data: str) -> None:
        self.text.append(data)


def _parse(page: str) -> _Tree:
    tree = _Tree()
    tree.feed(page)
    tree.close()
    assert not tree.problems, tree.problems[:3]
    assert not tree.stack, tree.stack
    return tree


def _svgs(page: str) -> list[ET.Element]:
    return [ET.fromstring(m.group()) for m in re.finditer(r"<svg\b.*?</svg>", page, re.DOTALL)]


def _by_id(svg: ET.Element, gid: str) -> ET.Element | None:
    return next((el for el in svg.iter() if el.get("id") == gid), None)


def _marks(group: ET.Element) -> list[ET.Element]:
    """The drawn markers of a point group: one <circle> each."""
    return list(group.iter(f"{SVG_NS}circle"))


def _bar_ids(svg: ET.Element, prefix: str) -> list[int]:
    """Row numbers of the bars drawn with ids ``<prefix>-<row>``."""
    pattern = re.compile(re.escape(prefix) + r"-(\d+)$")
    return sorted(int(m.group(1)) for el in svg.iter() if (m := pattern.match(el.get("id", ""))))


def _plottable(run) -> int:
    return sum(1 for l in run.layers  # an unmodelled layer's figures are None: not plotted
               if (l.metrics["arithmetic_intensity"] or 0) > 0
               and (l.metrics["achieved_flops_per_s"] or 0) > 0)


@pytest.fixture(scope="module")
def demo_page() -> str:
    return render(demo_result(hostile=True))


def test_page_parses_and_every_chart_is_well_formed_svg(demo_page: str) -> None:
    tree = _parse(demo_page)
    assert demo_page.startswith("<!DOCTYPE html>")
    assert [t for t, _a in tree.elements].count("script") == 1
    svgs = _svgs(demo_page)
    assert all(svg.tag == f"{SVG_NS}svg" for svg in svgs)


def test_one_roofline_and_one_layer_chart_per_model_target(demo_page: str) -> None:
    result = demo_result(hostile=True)
    svgs = _svgs(demo_page)
    rooflines = [s for s in svgs if s.get("data-chart") == "roofline"]
    layer_charts = [s for s in svgs if s.get("data-chart") == "layers"]
    assert len(rooflines) == len(layer_charts) == len(result.entries) == 2
    assert [(s.get("data-model"), s.get("data-target")) for s in rooflines] == \
        [(e.model, e.target) for e in result.ranked_entries]  # sections worst first
    ids = re.findall(r'\bid="([^"]*)"', demo_page)
    assert len(ids) == len(set(ids))  # every id unique in the page, charts included


def test_no_external_references(demo_page: str) -> None:
    tree = _parse(demo_page)
    assert not any(tag in {"link", "img", "iframe", "object", "embed", "base"}
                   for tag, _a in tree.elements)
    for tag, attrs in tree.elements:
        for name in ("src", "href", "xlink:href", "action", "poster", "data"):
            value = attrs.get(name)
            assert value is None or value.startswith("#"), (tag, name, value)
    for svg in _svgs(demo_page):
        for el in svg.iter():
            href = el.get(XLINK_HREF) or el.get("href")
            assert href is None or href.startswith("#")
    assert "@import" not in demo_page and "<!DOCTYPE svg" not in demo_page
    assert re.findall(r"url\((?!#)", demo_page) == []
    # The only absolute URLs are XML namespace names (identifiers, never fetched).
    urls = set(re.findall(r"https?://[^\s\"'<>)]+", demo_page))
    assert urls <= {"http://www.w3.org/2000/svg", "http://www.w3.org/1999/xlink"}, urls
    csp = next(a["content"] for t, a in tree.elements if a.get("http-equiv") ==
               "Content-Security-Policy")
    assert "default-src 'none'" in csp


def test_inline_script_is_the_one_the_policy_allows(demo_page: str) -> None:
    script = re.search(r"<script>(.*?)</script>", demo_page, re.DOTALL).group(1)
    digest = base64.b64encode(hashlib.sha256(script.encode()).digest()).decode()
    assert f"'sha256-{digest}'" in demo_page


@pytest.mark.parametrize("name", [
    HOSTILE, "</script><script>alert(1)</script>", "a\"b'c&d", "$\\frac{1}{2}$ cost",
    "esc\x1b[31mred\nnewline", "]]><!--", "\u202eevil",
])
def test_hostile_node_names_are_escaped_everywhere(name: str) -> None:
    layers = cnn_layers()
    layers[3] = replace(layers[3], name=name)  # the slowest conv: table, bars and annotation
    run = make_run(f"models/{name}.onnx", "ws-64x64-4mib", layers)
    entry = Entry(run.model, run.target, run, None, None,
                  (make_verdict("params-fit", run.model, run.target, FAIL, layer=name),))
    page = render(GateResult("check", ("policy.yaml",), (entry,)))
    tree = _parse(page)
    assert [t for t, _a in tree.elements].count("script") == 1
    assert not any(t == "img" for t, _a in tree.elements)
    assert not any(k.startswith("on") for _t, a in tree.elements for k in a)
    assert "\x1b" not in page and "<!--" not in page.replace("<!DOCTYPE", "")
    for svg in _svgs(page):  # still well-formed XML, and the name is text, never markup
        assert not any(el.tag.endswith("img") or el.tag.endswith("script") for el in svg.iter())
    if name == HOSTILE:
        assert HOSTILE not in page
        assert "&lt;img src=x onerror=alert(1)&gt;" in page
        texts = "".join(t for svg in _svgs(page) for el in svg.iter(f"{SVG_NS}text")
                        for t in el.itertext())
        assert HOSTILE in texts  # shown literally in the chart (bar label), as text


def test_roofline_points_and_roof_match_the_records() -> None:
    result = demo_result()
    entry = next(e for e in result.entries if e.base is not None and e.model.endswith("species.onnx"))
    ridge = PEAK_FLOPS_PER_S / DRAM_BYTES_PER_S  # 80 FLOP/byte for the made-up target
    vertices = charts.roof_vertices(PEAK_FLOPS_PER_S, DRAM_BYTES_PER_S, 0.1, 1e4)
    for x, y in vertices:  # Williams et al. 2009: min(peak, AI x bandwidth)
        assert y == pytest.approx(min(PEAK_FLOPS_PER_S, x * DRAM_BYTES_PER_S))
    assert vertices[1] == pytest.approx((ridge, PEAK_FLOPS_PER_S))
    svg = ET.fromstring(charts.roofline_svg(entry.head, entry.base, "t-roof"))
    head = _marks(_by_id(svg, "t-roof-head-points"))
    expected = {l.name for l in entry.head.layers if l.metrics["flops"] > 0}
    assert {c.get("data-layer") for c in head} == expected  # one marker per layer with FLOPs
    assert len(_marks(_by_id(svg, "t-roof-base-points"))) == _plottable(entry.base)
    assert svg.get("data-head-points") == str(_plottable(entry.head)) == "5"
    assert svg.get("data-head-unplottable") == "1"  # the Flatten layer (no FLOPs)
    # marker area grows with the layer's share of latency
    radius = {c.get("data-layer"): float(c.get("r")) for c in head}
    by_latency = sorted((l for l in entry.head.layers if l.metrics["flops"] > 0),
                        key=lambda l: l.metrics["latency_s"])
    ordered = [radius[l.name] for l in by_latency]
    assert ordered == sorted(ordered)
    # higher achieved FLOP/s is higher on the page (smaller y)
    ys = {c.get("data-layer"): float(c.get("cy")) for c in head}
    by_achieved = sorted((l for l in entry.head.layers if l.metrics["flops"] > 0),
                         key=lambda l: l.metrics["achieved_flops_per_s"])
    assert [ys[l.name] for l in by_achieved] == sorted((ys[l.name] for l in by_achieved),
                                                       reverse=True)


def test_svg_markers_match_the_records(demo_page: str) -> None:
    result = demo_result(hostile=True)
    rooflines = [s for s in _svgs(demo_page) if s.get("data-chart") == "roofline"]
    for svg, entry in zip(rooflines, result.ranked_entries):
        chart = svg.get("id")
        assert len(_marks(_by_id(svg, f"{chart}-head-points"))) == _plottable(entry.head)
        assert len(_marks(_by_id(svg, f"{chart}-base-points"))) == _plottable(entry.base)
        assert int(svg.get("data-head-points")) == _plottable(entry.head)
        figures = entry.head.target_figures
        assert float(svg.get("data-peak-flops-per-s")) == figures["peak_flops_per_s"]
        assert float(svg.get("data-dram-bytes-per-s")) == figures["dram_bytes_per_s"]
        assert float(svg.get("data-ridge-flop-per-byte")) == pytest.approx(
            figures["peak_flops_per_s"] / figures["dram_bytes_per_s"])
        # drawn geometry: the ridge marker sits on the roof's corner, the roof is flat after it
        path = _by_id(svg, f"{chart}-roof").find(f".//{SVG_NS}path").get("d")
        vertices = [tuple(map(float, p)) for p in re.findall(r"[ML] ([\d.]+) ([\d.]+)", path)]
        assert len(vertices) == 3 and vertices[1][1] == pytest.approx(vertices[2][1])
        assert vertices[0][1] > vertices[1][1]  # the bandwidth slope rises (SVG y grows down)
        ridge = _marks(_by_id(svg, f"{chart}-ridge"))[0]
        assert (float(ridge.get("cx")), float(ridge.get("cy"))) == pytest.approx(vertices[1],
                                                                                abs=0.01)


def test_layer_chart_bars_and_energy_parts_match_the_records(demo_page: str) -> None:
    result = demo_result(hostile=True)
    charts_ = [s for s in _svgs(demo_page) if s.get("data-chart") == "layers"]
    for svg, entry in zip(charts_, result.ranked_entries):
        chart, n = svg.get("id"), len(entry.head.layers)
        assert int(svg.get("data-layers-shown")) == n
        assert _bar_ids(svg, f"{chart}-latency") == list(range(n))
        for metric, _label, _colour in charts.ENERGY_PARTS:
            assert _bar_ids(svg, f"{chart}-{metric.replace('_', '-')}") == list(range(n))
        # bar widths are proportional to the layers' latencies, slowest first
        widths = [float(_by_id(svg, f"{chart}-latency-{row}").get("width")) for row in range(n)]
        latencies = sorted((l.metrics["latency_s"] for l in entry.head.layers), reverse=True)
        assert widths == sorted(widths, reverse=True)
        scale = widths[0] / latencies[0]
        assert widths == pytest.approx([v * scale for v in latencies], abs=0.01)


def test_micro_is_spelled_the_same_in_tables_and_chart_axes(demo_page: str) -> None:
    axes = set(re.findall(r"(?:latency|energy per inference) \(([^)]*)\)", demo_page))
    assert axes == {"us", "uJ"}  # the demo's layers take microseconds and microjoules
    assert fmt_joules(45.6e-6) == "45.6 uJ"  # the tables' formatter, same spelling
    assert not any(micro in demo_page for micro in ("\u00b5", "\u03bc", "&micro;", "&#181;"))


def test_huge_model_plots_top_layers_and_says_how_many_were_left_out() -> None:
    layers = [make_layer(f"block{i}.conv", 10_000 * (i + 1), 500, 20_000) for i in range(420)]
    run = make_run("models/huge.onnx", "ws-64x64-4mib", layers)
    entry = Entry(run.model, run.target, run, None, None, ())
    page = render(GateResult("check", (), (entry,)))
    roof, bars = _svgs(page)
    assert len(_marks(_by_id(roof, "e0-roofline-head-points"))) == charts.MAX_ROOFLINE_POINTS
    assert roof.get("data-head-left-out") == str(420 - charts.MAX_ROOFLINE_POINTS)
    assert "120 layers with the smallest latency left out" in page
    assert int(bars.get("data-layers-shown")) == charts.MAX_BAR_LAYERS
    assert _bar_ids(bars, "e0-layers-latency") == list(range(charts.MAX_BAR_LAYERS))
    assert "390 layers more (the table below lists the ones that matter)" in page
    rows = re.search(r"<h3>Layers</h3>.*?<tbody>(.*?)</tbody>", page, re.DOTALL).group(1)
    # the table lists the slowest layers (no base, no failing rule) and counts the rest
    assert rows.count("<tr") == html_layers.MAX_SLOWEST_LAYERS
    listed = re.findall(r'<td class="name">([^<]*)</td>', rows)
    assert listed == [f"block{i}.conv" for i in range(420 - html_layers.MAX_SLOWEST_LAYERS, 420)]
    assert ("And 370 more layers, none named by a rule, none among the slowest; full detail "
            "in the JSON report.") in page


def test_rules_and_layer_diff_table(demo_page: str) -> None:
    tree = _parse(demo_page)
    rules = [(a["data-rule"], a["data-verdict"]) for t, a in tree.elements
             if t == "tr" and "data-verdict" in a]
    order = {"fail": 0, "warning": 1, "waived": 2, "pass": 3}
    sections = re.findall(r'<section class="card st-[a-z]+ entry".*?</section>', demo_page,
                          re.DOTALL)
    for section in sections:  # failing rules first in every section
        words = re.findall(r'data-verdict="([a-z]+)"', section)
        assert words == sorted(words, key=order.__getitem__)
    assert sorted(rules) == sorted([("params-fit", "waived"), ("min-utilization", "warning"),
                                    ("params-fit", "fail"), ("min-utilization", "pass")])
    sortable = [a for t, a in tree.elements if t == "table" and a.get("class") == "sortable"]
    assert len(sortable) == 3  # the overview and one layer table per entry
    # every numeric cell carries its raw value for sorting
    cells = re.findall(r'<td class="num[^"]*" data-v="([^"]*)"', demo_page)
    assert cells and all(v in ("Infinity", "-Infinity") or float(v) == float(v) for v in cells)
    assert "Split the layer, quantize its weights" in demo_page  # the remedy is shown


def test_audit_index_lists_models_by_worst_verdict_with_trend() -> None:
    result = replace(demo_result(), command="audit",
                     errors=(ModelError("models/broken.onnx", "not an ONNX file"),))
    page = render(result)
    overview = re.search(r'id="overview-table".*?</table>', page, re.DOTALL).group()
    order = re.findall(r'<td class="name">(?:<a href="#e\d+">)?([^<]+)', overview)
    assert order == ["models/broken.onnx", "models/trailcam/species.onnx",
                     "models/handheld/wakeword.onnx"]  # not analysed, fail, warning
    assert "vs previous run" in overview
    assert "-50.0%" in overview  # the pruned wake-word model's energy and latency dropped
    assert "Models, worst first" in page


def test_removed_model_new_model_and_empty_run_render() -> None:
    base = make_run("models/old.onnx", "t", cnn_layers())
    removed = Entry(base.model, "t", None, base, None, ())
    new = make_run("models/new.onnx", "t", cnn_layers())
    added = Entry(new.model, "t", new, None, None, (make_verdict("r", new.model, "t", PASS),))
    page = render(GateResult("evaluate", (), (added, removed)))
    _parse(page)
    assert "removed in this change" in page and ">new<" in page
    assert len([s for s in _svgs(page) if s.get("data-chart") == "roofline"]) == 1
    empty = render(GateResult("check", (), (), notes=("no models changed",)))
    _parse(empty)
    assert "no models changed" in empty and "<svg" not in empty


def test_empty_model_and_non_finite_figures_render_without_warnings() -> None:
    """Warnings are errors in this suite: NaN/inf must not reach matplotlib's transforms."""
    layers = cnn_layers()
    odd = dict(layers[0].metrics, arithmetic_intensity=float("nan"), latency_s=float("inf"))
    layers[0] = replace(layers[0], metrics=odd)
    layers[1] = replace(layers[1], metrics=dict(layers[1].metrics, energy_mac_j=float("nan")))
    run = make_run("models/odd.onnx", "t", layers)
    empty = make_run("models/empty.onnx", "t", [])
    page = render(GateResult("check", (), (Entry(empty.model, "t", empty, None, None, ()),
                                           Entry(run.model, "t", run, None, None, ()))))
    _parse(page)
    roofs = [s for s in _svgs(page) if s.get("data-chart") == "roofline"]
    assert [r.get("data-head-points") for r in roofs] == ["0", "4"]  # NaN intensity: left out


def test_identical_results_give_byte_identical_reports() -> None:
    assert render(demo_result(hostile=True)) == render(demo_result(hostile=True))


def test_registered_as_reporter_with_a_command_line_option() -> None:
    names = [r.name for r in all_reporters()]
    assert "html" in names and REPORTER.help


def test_charts_need_no_plotting_library(monkeypatch: pytest.MonkeyPatch) -> None:
    """The charts are written as SVG directly: the report renders with matplotlib absent."""
    monkeypatch.setitem(sys.modules, "matplotlib", None)  # import matplotlib -> ImportError
    page = render(demo_result())
    assert len(_svgs(page)) == 4


# --- end to end: the audit command on the fictional scenario models ---------------

@pytest.fixture(scope="module")
def audit_outputs(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """``roofgate audit`` over the four fictional models on two targets, every report."""
    from click.testing import CliRunner

    from gate.cli import cli
    from gate.synth.scenario import write_scenario

    root = tmp_path_factory.mktemp("zoo")
    write_scenario(root)
    out = {name: root / "out" / f"report.{name}" for name in ("html", "sarif", "json")}
    policy = Path(__file__).resolve().parents[1] / "gate" / "policies" / "default.yaml"
    args = ["audit", str(root / "models"), "-t", "ws-64x64-4mib", "-t", "os-16x16-512kib",
            "-p", str(policy), *(x for name, path in out.items() for x in (f"--{name}", str(path)))]
    done = CliRunner().invoke(cli, args)
    assert done.exit_code in (0, 1), done.output  # pass or gate failed, never an error
    return out


def test_audit_command_writes_a_report_whose_charts_match_its_json_result(
        audit_outputs: dict[str, Path]) -> None:
    from gate.report.jsonout import read_result

    result = read_result(str(audit_outputs["json"]))
    page = audit_outputs["html"].read_text(encoding="utf-8")
    _parse(page)
    rooflines = [s for s in _svgs(page) if s.get("data-chart") == "roofline"]
    assert len(rooflines) == len(result.entries) == 8  # 4 models x 2 targets
    for svg, entry in zip(rooflines, result.ranked_entries):
        assert (svg.get("data-model"), svg.get("data-target")) == (entry.model, entry.target)
        group = _by_id(svg, f"{svg.get('id')}-head-points")
        plotted = len(_marks(group)) if group is not None else 0
        assert plotted == min(_plottable(entry.head), charts.MAX_ROOFLINE_POINTS)
        unmodelled = sum(1 for layer in entry.head.layers if not layer.modelled)
        assert int(svg.get("data-head-unmodelled")) == unmodelled
        assert plotted > 0 or unmodelled == len(entry.head.layers)  # empty only if unmodelled
        assert float(svg.get("data-peak-flops-per-s")) == \
            entry.head.target_figures["peak_flops_per_s"]
    assert "Models, worst first" in page
    # the notes encoder's sequence length is symbolic and unbound here: said, not plotted as 0
    assert "60 layers not modelled" in page and "no modelled layer to plot" in page
    # the SARIF log of the same run names the same blocking failures as the result object
    import json

    sarif = json.loads(audit_outputs["sarif"].read_text(encoding="utf-8"))
    errors = {(r["locations"][0]["physicalLocation"]["artifactLocation"]["uri"],
               r["properties"]["target"], r["ruleId"])
              for r in sarif["runs"][0]["results"] if r["level"] == "error"}
    assert errors == {(v.model, v.target, v.rule_id) for v in result.failed_verdicts
                      if v.blocks_merge}


# --- what a reviewer sees first ---------------------------------------------------------

def test_sections_follow_the_overview_worst_first(demo_page: str) -> None:
    overview = re.search(r'id="overview-table".*?</table>', demo_page, re.DOTALL).group()
    linked = re.findall(r'<a href="#(e\d+)">', overview)
    sections = re.findall(r'<section class="card st-[a-z]+ entry" id="(e\d+)"', demo_page)
    assert linked == sections
    statuses = re.findall(r'<section class="card st-([a-z]+) entry"', demo_page)
    rank = ["fail", "warn", "pass", "removed"]
    assert statuses[0] == "fail" and statuses == sorted(statuses, key=rank.index)


def test_blocking_list_leads_and_rules_come_before_the_charts(demo_page: str) -> None:
    assert demo_page.index('id="blocking"') < demo_page.index('id="overview"')
    for section in re.findall(r'<section class="card st-[a-z]+ entry".*?</section>', demo_page,
                              re.DOTALL):
        assert section.index("<h3>Rules</h3>") < section.index("<svg")
        rules = section[section.index("<h3>Rules</h3>"):section.index("<svg")]
        assert "table-wrap scroll" not in rules  # never inside a nested scroll box


def test_offending_layers_are_flagged_in_both_charts_and_the_table(demo_page: str) -> None:
    result = demo_result(hostile=True)
    failing = next(e for e in result.ranked_entries if e.status == FAIL)
    named = {f.layer for v in failing.verdicts if v.status == FAIL for f in v.failing if f.layer}
    assert named
    roof, bars = [s for s in _svgs(demo_page) if s.get("data-model") == failing.model][:2]
    for svg in (roof, bars):
        flagged = {el.get("data-layer") for el in svg.iter() if el.get("class") == "flagged"}
        assert named <= flagged, (svg.get("data-chart"), named, flagged)
    first_table = demo_page.split("<h3>Layers</h3>")[1].split("</table>")[0]
    assert re.search(r'<tr class="[^"]*\bflagged\b', first_table)


def test_roofline_labels_never_overlap_and_axes_say_what_they_plot(demo_page: str) -> None:
    for svg in (s for s in _svgs(demo_page) if s.get("data-chart") == "roofline"):
        boxes = []
        for text in _by_id(svg, f"{svg.get('id')}-labels").iter(f"{SVG_NS}text"):
            x, y, width = float(text.get("x")), float(text.get("y")), 6.1 * len(text.text or "")
            left = {"start": x, "end": x - width, "middle": x - width / 2}[text.get("text-anchor")]
            boxes.append((left, y - 11, left + width, y + 2))
        for k, a in enumerate(boxes):
            for b in boxes[k + 1:]:
                assert not (a[0] < b[2] and b[0] < a[2] and a[1] < b[3] and b[1] < a[3]), (a, b)
        texts = " ".join(t for el in svg.iter(f"{SVG_NS}text") for t in el.itertext())
        assert "achieved per layer" in texts and f"attainable at {svg.get('data-precision')}" \
            in texts


def test_base_markers_and_energy_components_have_distinct_colours() -> None:
    from gate.report.html_assets import CSS

    for palette in CSS.split("@media")[:2]:
        colours = dict(re.findall(r"--rg-([a-z-]+):(#[0-9a-f]{6})", palette))
        energy = {v for k, v in colours.items() if k.startswith("e-")}
        assert colours["base"] not in energy and colours["head"] not in energy
        assert len(energy) == 6


def test_a_chart_costs_milliseconds_not_seconds() -> None:
    """Not a timing test: the charts are built from strings, no figure or font is rendered,
    so the only work is proportional to the layers drawn (checked by the element count)."""
    layers = [make_layer(f"block{i}.conv", 10_000 * (i + 1), 500, 20_000) for i in range(420)]
    run = make_run("models/huge.onnx", "ws-64x64-4mib", layers)
    svg = ET.fromstring(charts.roofline_svg(run, None, "t"))
    assert sum(1 for _ in svg.iter()) < 6 * charts.MAX_ROOFLINE_POINTS + 200


def _with_ungated(result: GateResult) -> GateResult:
    return replace(result, ungated=(
        UngatedModel("models/new/<b>extra</b>.onnx", "no model group covers it; add a group or "
                     "list it under ungated: in roofgate.yaml"),
        UngatedModel("models/scratch/tmp.onnx", "matches ungated: models/scratch/**",
                     skipped=True)))


def test_blocking_findings_then_not_gated_models_lead_the_page() -> None:
    result = _with_ungated(demo_result())
    page = render(result)
    _parse(page)
    lead = page[page.index('id="blocking"'):page.index("</section>", page.index('id="blocking"'))]
    findings = re.findall(r"<li><a href=\"#e\d+\">(.*?)</a></li>", lead)
    assert findings == [html_escape(s) for _e, s in blocking_lines(result)]
    assert lead.index('id="blocking-findings"') < lead.index('id="not-gated"')
    assert html_escape(not_gated_sentence(result.not_gated[0])) in lead
    assert "<b>extra" not in page  # the file name is escaped
    assert "What blocks the merge (2 rules)" in lead  # params-fit and not-gated
    # the skipped file is listed (never silently), but not as blocking, and below the lead
    assert "scratch/tmp.onnx" not in lead
    assert page.index('id="blocking"') < page.index('id="skipped"') < page.index('id="overview"')
    assert "1 not gated, 1 skipped" in page


def test_only_not_gated_models_still_block_at_the_top() -> None:
    only = GateResult("check", ("p.yaml",), (), ungated=(
        UngatedModel("models/x.onnx", "no model group covers it"),))
    page = render(only)
    _parse(page)
    assert "merge blocked" in page and 'id="not-gated"' in page
    assert 'id="blocking-findings"' not in page


def test_every_section_lists_the_rules_that_applied(demo_page: str) -> None:
    result = demo_result(hostile=True)
    sections = re.findall(r'<section class="card st-[a-z]+ entry".*?</section>', demo_page,
                          re.DOTALL)
    assert len(sections) == len(result.ranked_entries)
    for section, entry in zip(sections, result.ranked_entries):
        applied = re.search(r'<p class="rules-applied">Rules applied: (.*?)\.</p>', section)
        assert applied is not None
        assert re.findall(r"<code>([^<]*)</code>", applied.group(1)) == list(entry.rules_applied)


# --- unknown figures (None): never drawn or printed as 0 --------------------------------------

def _with_unknowns() -> tuple[GateResult, set[str]]:
    """The demo's species model, head and base, where one layer is not modelled (its own MACs,
    latency and energy unknown: None) and one modelled layer has an unknown energy part."""
    base = make_run("models/odd.onnx", "ws-64x64-4mib", cnn_layers())
    layers = cnn_layers(2)
    unknown = {m: None for m in ("macs", "flops", "latency_s", "energy_j", "compute_s",
                                 "achieved_flops_per_s", "arithmetic_intensity", "cycles",
                                 *(f"energy_{p}" for p in ("mac_j", "buffer_j", "noc_j",
                                                           "dram_param_j", "dram_act_j",
                                                           "static_j")))}
    layers[2] = replace(layers[2], modelled=False, unmodelled_reason="unbound dim 'seq'",
                        metrics=dict(layers[2].metrics, **unknown))
    layers[1] = replace(layers[1], metrics=dict(layers[1].metrics, energy_noc_j=None))
    head = replace(make_run("models/odd.onnx", "ws-64x64-4mib", cnn_layers(2)),
                   layers=tuple(layers))
    base_layers = list(base.layers)
    base_layers[3] = replace(base_layers[3], metrics=dict(base_layers[3].metrics,
                                                          latency_s=None))
    base = replace(base, layers=tuple(base_layers))
    from tests.reportkit import diff_of

    entry = Entry(head.model, head.target, head, base, diff_of(base, head), ())
    return GateResult("check", (), (entry,)), {layers[2].name, layers[1].name}


def test_unknown_figures_are_skipped_and_counted_in_the_captions() -> None:
    result, _names = _with_unknowns()
    page = render(result)
    _parse(page)
    roof, bars = _svgs(page)
    entry = result.entries[0]
    dead = "stage1.dw"
    # the roofline: the unmodelled layer is counted, not placed; no marker for it anywhere
    assert roof.get("data-head-unmodelled") == "1"
    assert dead not in {c.get("data-layer") for c in _marks(_by_id(roof, "e0-roofline-head-points"))}
    assert "1 layer not modelled" in page
    # the bar chart: no bar for the unknown latency, the caption says how many
    assert bars.get("data-latency-unknown") == "1"
    shown = int(bars.get("data-layers-shown"))
    assert shown == len(entry.head.layers) - 1
    labels = [t.text for t in bars.iter(f"{SVG_NS}text") if t.get("text-anchor") == "end"]
    assert dead not in labels
    assert "1 layer with an unknown latency not drawn (unknown, not zero)" in page
    # a row whose energy split is partly unknown gets a '?' and no stack at all
    row = next(k for k, l in enumerate(charts.bar_layers(entry.head).layers)
               if l.name == "stage1.conv")
    assert _by_id(bars, f"e0-layers-energy-mac-j-{row}") is None
    assert [t.get("data-layer") for t in bars.iter(f"{SVG_NS}text")
            if t.get("data-unknown") == "energy"] == ["stage1.conv"]
    assert bars.get("data-energy-unknown") == "1" and "energy unknown for 1 layer" in page
    # the base's unknown latency of stage2.conv gets no tick, the known ones do
    ticks = _by_id(bars, "e0-layers-base-latency")
    assert ticks is not None and len(list(ticks)) == shown - 1
    # tables: unknown figures read '?', never 0
    table = page.split("<h3>Layers</h3>")[1].split("</table>")[0]
    dead_row = re.search(r"<tr[^>]*>(?:(?!</tr>).)*stage1\.dw(?:(?!</tr>).)*</tr>", table,
                         re.DOTALL).group()
    cells = re.findall(r'<td class="num[^"]*" data-v="[^"]*">([^<]*)</td>', dead_row)
    assert cells[1] == "?" and cells[2] == "?"  # head latency, latency change
    assert "0 s" not in dead_row


def test_unknown_figures_read_as_unknown_in_markdown_and_terminal() -> None:
    from gate.report import markdown, terminal

    result, _names = _with_unknowns()
    text = markdown.render(result)
    rows = {line.split(" | ")[0][2:]: line for line in text.splitlines()
            if line.startswith("| stage")}
    assert "5.10 us \u2192 ? | ? |" in rows["stage1.dw"]  # head latency unknown
    assert "| ? \u2192 20.1 us | ? |" in rows["stage2.conv"]  # base latency unknown
    # totals whose latency is unknown on one side: neither "unchanged" nor "improved"
    entry = result.entries[0]
    assert entry.diff is not None
    totals = {m: (v[1], v[1]) for m, v in entry.diff.totals.items()}
    totals["latency_s"] = (None, entry.diff.totals["latency_s"][1])
    flat = replace(result, entries=(replace(entry, diff=replace(entry.diff, totals=totals)),))
    line = terminal.render(flat).splitlines()[1]
    assert "unchanged" not in line and "improved" not in line and "(?)" in line


# --- bounded: a 200k-layer model gives a small page ---------------------------------------------

BIG_CHAIN_LAYERS = 200_000


def _big_chain_result() -> tuple[GateResult, str, str]:
    """A 200k-layer chain built as records (no ONNX, no profiling: the reporters only see the
    result): one layer changed against the base, another named by a failing rule."""
    from gate.result import LayerChange, RunDiff

    template = make_layer("t", 50_000, 2_000, 40_000)
    names = [f"chain.{k}.conv" for k in range(BIG_CHAIN_LAYERS)]
    layers = [replace(template, name=name) for name in names]
    changed, failing = names[123_456], names[7_777]
    wide = make_layer(changed, 400_000, 300_000, 40_000)
    head_layers = list(layers)
    head_layers[123_456] = wide
    base = replace(make_run("models/chain.onnx", "ws-64x64-4mib", layers[:2]),
                   layers=tuple(layers))
    head = replace(base, layers=tuple(head_layers))
    deltas = {m: (template.metrics[m], wide.metrics[m]) for m in wide.metrics
              if wide.metrics[m] != template.metrics[m]}
    changes = tuple(
        LayerChange("changed" if k == 123_456 else "unchanged", name, name, "Conv", "name",
                    deltas if k == 123_456 else {})
        for k, name in enumerate(names))
    diff = RunDiff(head.model, head.target, {m: (base.metrics[m], head.metrics[m])
                                             for m in base.metrics}, changes)
    verdict = make_verdict("params-fit", head.model, head.target, FAIL, layer=failing)
    entry = Entry(head.model, head.target, head, base, diff, (verdict,))
    return GateResult("check", ("p.yaml",), (entry,)), changed, failing


@pytest.mark.slow
def test_a_200k_layer_model_gives_an_html_page_under_5_mb_listing_what_matters() -> None:
    from gate.report import markdown

    result, changed, failing = _big_chain_result()
    page = render(result)
    size = len(page.encode("utf-8"))
    assert size < 5 * 1024 * 1024, size
    table = page.split("<h3>Layers</h3>")[1].split("</table>")[0]
    listed = set(re.findall(r'<td class="name">([^<]*)</td>', table))
    assert failing in listed and changed in listed  # the failing and the changed layer
    assert len(listed) <= 2 + html_layers.MAX_SLOWEST_LAYERS
    rest = BIG_CHAIN_LAYERS - len(listed)
    assert (f"And {rest:,} more layers, unchanged; full detail in the JSON report."
            in page)
    assert re.search(r'<tr class="[^"]*flagged[^"]*">(?:(?!</tr>).)*' + re.escape(failing),
                     table, re.DOTALL)
    # the pull-request comment of the same run stays under the code host's limit and names
    # the failing layer (its rule row) and the changed layer, with a count of the rest
    text = markdown.render(result)
    assert markdown.comment_size(text) <= markdown.COMMENT_LIMIT_CHARS
    assert failing in text and changed in text
    assert f"And {BIG_CHAIN_LAYERS - 1:,} more layers unchanged" in text


def test_changed_layers_beyond_the_cap_are_counted_largest_change_first() -> None:
    """300 changed layers of 1,000: the table lists the 200 with the largest latency change
    (gate.diff.ranked_changes), the slowest and the failing one, and counts the rest."""
    from gate.result import LayerChange, RunDiff

    count, moved = 1000, 300
    base_layers = [make_layer(f"l{k}", 10_000, 500, 20_000) for k in range(count)]
    head_layers = [make_layer(f"l{k}", 10_000, 500, 20_000 + 1000 * k) if k < moved
                   else base_layers[k] for k in range(count)]
    base = make_run("models/m.onnx", "t", base_layers)
    head = make_run("models/m.onnx", "t", head_layers)
    changes = tuple(LayerChange(
        "changed" if k < moved else "unchanged", f"l{k}", f"l{k}", "Conv", "name",
        {"latency_s": (base_layers[k].metrics["latency_s"], head_layers[k].metrics["latency_s"])}
        if k < moved else {}) for k in range(count))
    diff = RunDiff(head.model, "t", {}, changes)
    entry = Entry(head.model, "t", head, base, diff,
                  (make_verdict("r", head.model, "t", FAIL, layer="l999"),))
    picked = html_layers.pick_changes(diff, head.layers, {"l999"})
    listed = {f"l{k}" for k in picked.positions}
    assert {f"l{k}" for k in range(moved - 200, moved)} <= listed  # largest changes
    assert "l999" in listed and "l0" not in listed
    assert picked.rest_changed == moved - 200
    assert picked.rest_unchanged == count - len(listed) - picked.rest_changed
    page = render(GateResult("check", (), (entry,)))
    assert (f"And {moved - 200} more changed layers with a smaller latency change and "
            f"{picked.rest_unchanged} layers, unchanged; full detail in the JSON report.") in page


def test_a_rule_failing_at_every_layer_lists_its_worst_findings_and_counts_the_rest() -> None:
    from gate.report.html_tables import MAX_FINDINGS_PER_RULE
    from gate.result import Finding, Verdict

    layers = [make_layer(f"l{k}", 10_000, 500, 20_000) for k in range(5000)]
    run = make_run("models/m.onnx", "t", layers)
    findings = tuple(Finding(f"l{k}", "utilization", 0.01 * (k % 7), 0.3,
                             f"layer l{k}: utilization below 30%", FAIL) for k in range(5000))
    verdict = Verdict("min-util", "min_layer_metric", "error", "d", run.model, "t", FAIL,
                      "5000 layers below 30%", "fuse it", findings)
    page = render(GateResult("check", (), (Entry(run.model, "t", run, None, None,
                                                  (verdict,)),)))
    rules = page.split("<h3>Rules</h3>")[1].split("</table>")[0]
    shown = re.findall(r'<tr class="finding failing" data-layer="([^"]*)"', rules)
    assert len(shown) == MAX_FINDINGS_PER_RULE
    assert set(shown) <= {f"l{k}" for k in range(5000) if k % 7 == 0}  # furthest below first
    assert f"And {5000 - MAX_FINDINGS_PER_RULE:,} more findings of this rule" in rules
    assert len(page.encode("utf-8")) < 1024 * 1024


def test_captions_of_a_model_with_nothing_drawable_say_so_without_false_marks() -> None:
    """Every layer unmodelled (figures unknown), one named by a failing rule: the captions
    count them and do not claim a ringed point or a shaded row that is not drawn."""
    unknown = {m: None for m in ("macs", "flops", "latency_s", "energy_j",
                                 "achieved_flops_per_s", "arithmetic_intensity")}
    layers = [replace(l, modelled=False, unmodelled_reason="unbound dim",
                      metrics=dict(l.metrics, **unknown)) for l in cnn_layers()]
    run = replace(make_run("models/u.onnx", "t", cnn_layers()), layers=tuple(layers))
    entry = Entry(run.model, "t", run, None, None,
                  (make_verdict("r", run.model, "t", FAIL, layer=layers[0].name),))
    page = render(GateResult("check", (), (entry,)))
    _parse(page)
    captions = re.findall(r"<figcaption>(.*?)</figcaption>", page)
    assert "6 layers not modelled" in captions[0] and "ringed" not in captions[0]
    assert captions[1].startswith("No layer with a known latency to draw; 6 layers with an "
                                  "unknown latency not drawn")
    assert "shaded" not in captions[1]
