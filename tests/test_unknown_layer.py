"""Unknown is never zero, per layer: a layer roofgate cannot cost shows '?' and JSON null.

A model with one op roofgate has no cost function for (a custom-domain op) goes through
the public CLI of every command: profile (table, JSON, CSV), evaluate (JSON and HTML
reports), baseline (snapshot round trip), diff and check (a real temporary git
repository). The unmodelled layer's MACs, FLOPs, latency and energy are unknown, never
0 or "unchanged"; its activation sizes, known from its shapes, stay known. A rule that
reads an unknown figure fails ("cannot be checked"), as for unknown model totals.
"""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path

import numpy as np
import onnx
import pytest
from click.testing import CliRunner
from onnx import TensorProto, helper, numpy_helper

from gate.cli import cli
from gate.snapshot import read_snapshot
from tests.gitkit import Repo

TARGET = "ws-64x64-4mib"
ODD = "odd"  # the unmodelled layer
UNKNOWN_METRICS = ("macs", "flops", "latency_s", "energy_j", "cycles", "utilization",
                   "param_dram_bytes", "achieved_flops_per_s", "arithmetic_intensity")
POLICY = """\
version: 1
name: t
rules:
  - {id: fits, kind: fits_in_buffer, check: both}
  - {id: layer-latency, kind: max_latency, level: layer, max: 5 ms}
"""


def odd_model(width: int = 32) -> onnx.ModelProto:
    """MatMul -> Relu -> org.example.Mystery (no cost function; its output shape declared)."""
    weight = numpy_helper.from_array(np.ones((64, width), np.float32), "W")
    nodes = [helper.make_node("MatMul", ["x", "W"], ["h"], name="fc"),
             helper.make_node("Relu", ["h"], ["r"], name="act"),
             helper.make_node("Mystery", ["r"], ["y"], name=ODD, domain="org.example")]
    graph = helper.make_graph(
        nodes, "odd", [helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 64])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, width])], [weight])
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17),
                                                   helper.make_opsetid("org.example", 1)])


def invoke(args: list[str]):
    return CliRunner().invoke(cli, args)


def odd_layer(layers: list[dict]) -> dict:
    (layer,) = [layer for layer in layers if layer["name"] == ODD]
    return layer


def assert_unknown_never_zero(metrics: dict) -> None:
    for name in UNKNOWN_METRICS:
        assert metrics[name] is None, (name, metrics[name])
    assert metrics["input_bytes"] == metrics["output_bytes"] == 1 * 32 * 4  # known from shapes


@pytest.fixture()
def folder(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    onnx.save(odd_model(), tmp_path / "m.onnx")
    (tmp_path / "p.yaml").write_text(POLICY, encoding="utf-8")
    monkeypatch.chdir(tmp_path)
    return tmp_path


def test_profile_table_json_and_csv_show_the_unmodelled_layer_as_unknown(folder: Path) -> None:
    table = invoke(["profile", "m.onnx", "-t", TARGET])
    assert table.exit_code == 0, table.output
    row = next(line for line in table.stdout.splitlines() if " Mystery " in line).split()
    # '#', layer, op, shape, precision, MACs, FLOPs, param size (2 cells), input, output, ...
    assert row[5:7] == ["?", "?"], row
    assert row[-1] == "!" and row[-2] == "?", row  # its latency, then the not-modelled mark
    document = json.loads(invoke(["profile", "m.onnx", "-t", TARGET, "--format", "json"]).stdout)
    layer = odd_layer(document["layers"])
    assert layer["macs"] is None and layer["flops"] is None and layer["param_reuse"] is None
    assert layer["input_bytes"] == 128
    assert_unknown_never_zero(odd_layer(document["targets"][0]["layers"])["metrics"])
    rows = list(csv.DictReader(io.StringIO(
        invoke(["profile", "m.onnx", "-t", TARGET, "--format", "csv"]).stdout)))
    (odd,) = [r for r in rows if r["name"] == ODD]
    assert odd["macs"] == odd["latency_s"] == odd["energy_j"] == ""  # empty cell, not 0
    assert odd["input_bytes"] == "128"


def test_evaluate_reports_null_and_fails_a_layer_rule_that_reads_the_unknown(folder: Path) -> None:
    result = invoke(["evaluate", "m.onnx", "-t", TARGET, "-p", "p.yaml", "--json", "r.json",
                     "--html", "r.html", "--markdown", "r.md"])
    assert result.exit_code == 1, result.output  # layer-latency cannot be checked at 'odd'
    assert f"at layer {ODD}: latency unknown (?), so the limit of 5.00 ms cannot be checked" \
        in result.output, result.output
    assert "above the limit" not in result.output
    # the remedy fits an unknown figure (know it), not the rule's (speed the layer up)
    assert "cannot be checked. Fix: bind the unbound dims (--dim, --shape)" in result.output
    document = json.loads((folder / "r.json").read_text(encoding="utf-8"))
    text = json.dumps(document)
    assert '"latency_s": null' in text
    page = (folder / "r.html").read_text(encoding="utf-8")
    assert "1 layer with an unknown latency not drawn" in page  # no bar at 0


def test_the_fits_rule_still_judges_known_sizes_and_passes_them(folder: Path) -> None:
    (folder / "p.yaml").write_text(POLICY.split("  - {id: layer-latency")[0], encoding="utf-8")
    result = invoke(["evaluate", "m.onnx", "-t", TARGET, "-p", "p.yaml"])
    assert result.exit_code == 0, result.output  # 128 B in and out fit: known, judged, fine


def test_baseline_writes_null_and_reads_it_back_as_unknown(folder: Path) -> None:
    result = invoke(["baseline", "m.onnx", "-t", TARGET, "-o", "snap.json"])
    assert result.exit_code == 0, result.output
    raw = json.loads((folder / "snap.json").read_text(encoding="utf-8"))
    assert_unknown_never_zero(odd_layer(raw["runs"][0]["layers"])["metrics"])
    (run,) = read_snapshot(str(folder / "snap.json"))
    layer = run.layer(ODD)
    assert layer is not None and not layer.modelled
    assert_unknown_never_zero(dict(layer.metrics))


def test_diff_calls_an_unknown_layer_unknown_never_unchanged(folder: Path) -> None:
    assert invoke(["baseline", "m.onnx", "-t", TARGET, "-o", "snap.json"]).exit_code == 0
    for old in ("snap.json", "m.onnx"):
        result = invoke(["diff", old, "m.onnx", "-t", TARGET])
        assert result.exit_code == 0, result.output
        assert "0 changed, 2 unchanged, 1 unknown" in result.stdout, result.stdout
        line = next(x for x in result.stdout.splitlines() if " Mystery " in x)
        assert line.split()[:3] == ["unknown", "Mystery", ODD], line
        assert "latency ? -> ? (?)" in line and "MACs ? -> ? (?)" in line, line


def test_a_layer_regression_rule_on_an_unknown_layer_fails(folder: Path) -> None:
    (folder / "p.yaml").write_text(
        "version: 1\nname: t\nrules:\n  - {id: reg, kind: max_regression, level: layer, "
        "metric: latency_s, max_increase_pct: 10}\n", encoding="utf-8")
    assert invoke(["baseline", "m.onnx", "-t", TARGET, "-o", "snap.json"]).exit_code == 0
    result = invoke(["evaluate", "m.onnx", "-t", TARGET, "-p", "p.yaml", "--baseline",
                     "snap.json", "--json", "r.json"])
    assert result.exit_code == 1, result.output
    (entry,) = json.loads((folder / "r.json").read_text(encoding="utf-8"))["result"]["entries"]
    (verdict,) = entry["verdicts"]
    (finding,) = verdict["findings"]
    assert finding["layer"] == ODD and finding["value"] is None
    assert "unknown in the base and head, so the regression cannot be checked" in \
        finding["message"]
    assert f"at layer {ODD}: latency unknown (?), so the rule cannot be checked" in result.output


def test_check_shows_the_unmodelled_layer_as_unknown(tmp_path: Path,
                                                    monkeypatch: pytest.MonkeyPatch) -> None:
    repo = Repo(tmp_path / "repo")
    repo.write("roofgate.yaml", f"targets: [{TARGET}]\npolicies: [p.yaml]\n"
                                "models:\n  - paths: ['models/*.onnx']\n")
    repo.write("p.yaml", POLICY.split("  - {id: layer-latency")[0])
    repo.write("models/m.onnx", odd_model().SerializeToString())
    repo.commit("base")
    repo.branch("pr")
    repo.write("models/m.onnx", odd_model(width=48).SerializeToString())
    repo.commit("wider")
    monkeypatch.chdir(repo.path)
    result = invoke(["check", "--base", "main", "--json", "r.json", "--markdown", "r.md"])
    assert result.exit_code == 0, result.output
    document = json.loads((repo.path / "r.json").read_text(encoding="utf-8"))
    (entry,) = document["result"]["entries"]
    head = odd_layer(entry["head"]["layers"])
    assert head["metrics"]["latency_s"] is None and head["metrics"]["macs"] is None
    (change,) = [c for c in entry["diff"]["layers"] if c["head_name"] == ODD]
    assert change["status"] == "changed"  # its known output size grew; its cost is unknown
    assert change["deltas"]["latency_s"] == [None, None]
    markdown = (repo.path / "r.md").read_text(encoding="utf-8")
    assert "? \u2192 ?" in markdown
