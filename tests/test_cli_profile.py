"""``roofgate profile`` through the real click group: formats, targets and hostile inputs."""

from __future__ import annotations

import csv
import io
import json
from collections.abc import Callable
from pathlib import Path

import numpy as np
import onnx
import pytest
from click.testing import CliRunner
from loadkit import chain, deeply_nested_if, model, save, small_cnn, vi
from onnx import helper, numpy_helper

from gate.cli import cli
from gate.model.loader import load_model
from gate.profile import profile_model
from gate.report.profile_text import CSV_FIELDS, CSV_TARGET_FIELDS
from gate.targets import builtin_target_names


def _run(*args: str):
    return CliRunner().invoke(cli, ["profile", *args])


@pytest.fixture()
def cnn(tmp_path: Path) -> Path:
    return save(small_cnn(batch="batch"), tmp_path / "cnn.onnx")


def test_table_has_layers_totals_and_coverage(cnn: Path) -> None:
    result = _run(str(cnn), "--dim", "batch=1")
    assert result.exit_code == 0, result.output
    out = result.stdout
    for name in ("conv1", "relu1", "pool1", "fc", "softmax"):
        assert name in out
    assert "total: 9 layers" in out and "coverage: 9/9 layers modelled" in out


def test_table_reports_unbound_dim(cnn: Path) -> None:
    result = _run(str(cnn))
    assert result.exit_code == 0
    assert "--dim batch=N" in result.stdout and "coverage: 2/9" in result.stdout
    # the hint is said once, in the table (stderr repeats it only for json and csv)
    assert result.stdout.count("--dim batch=N") == 1 and "--dim batch=N" not in result.stderr


def test_json_is_deterministic_and_matches_profile(cnn: Path) -> None:
    first = _run(str(cnn), "--dim", "batch=2", "--format", "json")
    second = _run(str(cnn), "--dim", "batch=2", "--format", "json")
    assert first.exit_code == 0 and first.stdout == second.stdout
    data = json.loads(first.stdout)
    assert data["format"] == "roofgate-profile" and data["version"] == 2
    expected = profile_model(load_model(cnn, {"batch": 2}))
    assert data["totals"]["macs"] == expected.total_macs
    assert data["totals"]["param_bytes"] == expected.total_param_bytes
    conv = data["layers"][0]
    assert conv["name"] == "conv1" and conv["outputs"][0]["shape"] == [2, 8, 8, 8]
    assert conv["inputs"][1] == {"name": "w1", "shape": [8, 3, 3, 3], "dtype": "FLOAT"}
    assert conv["macs"] == expected.layers[0].macs and conv["modelled"] is True
    assert data["coverage"]["node_share"] == 1.0 and data["targets"] == []
    assert first.stdout == _expected_layout(data)


def _expected_layout(data: dict) -> str:
    """json.dumps(indent=2, sort_keys=True), except that every element of a ``layers`` list
    is one line (``, `` and ``: `` separators, keys sorted)."""
    rows: dict[str, str] = {}

    def placeholders(items: list) -> list:
        marks = []
        for item in items:
            mark = f"<row {len(rows)}>"
            rows[json.dumps(mark)] = json.dumps(item, sort_keys=True, separators=(", ", ": "))
            marks.append(mark)
        return marks

    shaped = {**data, "layers": placeholders(data["layers"]),
              "targets": [{**t, "layers": placeholders(t["layers"])} for t in data["targets"]]}
    text = json.dumps(shaped, sort_keys=True, indent=2)
    for mark, row in rows.items():
        text = text.replace(mark, row)
    return text + "\n"


def test_json_is_written_in_bounded_pieces(tmp_path: Path) -> None:
    """Large profiles are written as they are built: no piece holds more than one batch of
    layer lines (memory bounded by the batch, not by the graph); the pieces join to the
    document ``render`` gives."""
    from gate.report import profile_text

    loaded = load_model(save(chain(3 * profile_text._ROWS_PER_CHUNK), tmp_path / "c.onnx"))
    profile = profile_model(loaded)
    pieces = list(profile_text.render_chunks("json", profile, [], []))
    assert max(piece.count("\n") for piece in pieces) <= profile_text._ROWS_PER_CHUNK
    assert len(pieces) > 3 and "".join(pieces) == profile_text.render("json", profile, [], [])
    assert len(json.loads("".join(pieces))["layers"]) == 3 * profile_text._ROWS_PER_CHUNK


def test_json_layout_with_targets(cnn: Path) -> None:
    result = _run(str(cnn), "--dim", "batch=2", "--format", "json", "-t", "ws-64x64-4mib")
    data = json.loads(result.stdout)
    assert len(data["targets"][0]["layers"]) == len(data["layers"]) == 9
    assert result.stdout == _expected_layout(data)


def test_csv_fields_and_rows(cnn: Path) -> None:
    result = _run(str(cnn), "--dim", "batch=1", "--format", "csv")
    rows = list(csv.DictReader(io.StringIO(result.stdout)))
    assert tuple(rows[0]) == CSV_FIELDS and len(rows) == 9
    assert rows[0]["output_shapes"] == "1x8x8x8" and rows[0]["modelled"] == "true"


def test_precision_override_in_output(cnn: Path) -> None:
    native = json.loads(_run(str(cnn), "--dim", "batch=1", "--format", "json").stdout)
    int8 = json.loads(_run(str(cnn), "--dim", "batch=1", "--format", "json",
                           "--precision", "int8").stdout)
    assert int8["precision"] == "int8" and int8["totals"]["macs"] == native["totals"]["macs"]
    # conv1: 216 weights (a quarter of their fp32 bytes) and 8 biases at int32, the
    # accumulator's width at an integer precision (common practice, no source).
    assert int8["layers"][0]["param_bytes"] == 216 + 8 * 4
    assert native["layers"][0]["param_bytes"] == (216 + 8) * 4


def test_targets_side_by_side(cnn: Path) -> None:
    names = builtin_target_names()[:2]
    args = [str(cnn), "--dim", "batch=1"] + [a for n in names for a in ("--target", n)]
    table = _run(*args)
    assert table.exit_code == 0, table.output
    assert all(f"on {n} (" in table.stdout for n in names)
    data = json.loads(_run(*args, "--format", "json").stdout)
    assert [t["target"] for t in data["targets"]] == names
    layer = data["targets"][0]["layers"][0]
    for metric in ("utilization", "latency_s", "energy_j", "param_dram_bytes", "act_dram_bytes"):
        assert metric in layer["metrics"]
    rows = list(csv.DictReader(io.StringIO(_run(*args, "--format", "csv").stdout)))
    assert tuple(rows[0]) == CSV_FIELDS + CSV_TARGET_FIELDS and len(rows) == 9 * len(names)


def test_hostile_names_are_cleaned(tmp_path: Path) -> None:
    nodes = [helper.make_node("Relu", ["x"], ["y"], name="=cmd|evil\x1b[31m\nline")]
    path = save(model(nodes, [vi("x", [2])], [vi("y", None)]), tmp_path / "m.onnx")
    table = _run(str(path)).stdout
    assert "\x1b" not in table and "evil" in table
    assert not any(line.startswith("line") for line in table.splitlines())
    rows = list(csv.DictReader(io.StringIO(_run(str(path), "--format", "csv").stdout)))
    assert rows[0]["name"].startswith("'=")
    data = json.loads(_run(str(path), "--format", "json").stdout)
    assert data["layers"][0]["name"] == "=cmd|evil\x1b[31m\nline"  # JSON keeps it, escaped


def test_custom_op_reported_as_unmodelled(tmp_path: Path) -> None:
    proto = model([helper.make_node("Frobnicate", ["x"], ["y"], domain="vendor.x")],
                  [vi("x", [2])], [vi("y", None)],
                  extra_opsets=[helper.make_opsetid("vendor.x", 1)])
    result = _run(str(save(proto, tmp_path / "m.onnx")))
    assert result.exit_code == 0
    assert "unmodelled: vendor.x.Frobnicate x1: no cost model" in result.stdout


def test_external_data_outside_folder_warns_on_stderr(tmp_path: Path) -> None:
    proto = model([helper.make_node("MatMul", ["x", "w"], ["y"])], [vi("x", [1, 4])],
                  [vi("y", None)], [numpy_helper.from_array(np.ones((4, 4), np.float32), "w")])
    path = tmp_path / "m.onnx"
    onnx.save_model(proto, str(path), save_as_external_data=True, location="m.bin",
                    size_threshold=0)
    saved = onnx.load(str(path), load_external_data=False)
    saved.graph.initializer[0].external_data[0].value = "../../elsewhere.bin"
    onnx.save(saved, str(path))
    result = _run(str(path))
    assert result.exit_code == 0 and "outside the model's folder" in result.stderr


def _write(content: bytes) -> Callable[[Path], Path]:
    def make(folder: Path) -> Path:
        path = folder / "bad.onnx"
        path.write_bytes(content)
        return path
    return make


def _save(proto_factory: Callable[[], onnx.ModelProto]) -> Callable[[Path], Path]:
    return lambda folder: save(proto_factory(), folder / "bad.onnx")


def _future_opset() -> onnx.ModelProto:
    proto = chain(1)
    proto.opset_import[0].version = onnx.defs.onnx_opset_version() + 1
    return proto


def _cycle() -> onnx.ModelProto:
    nodes = [helper.make_node("Add", ["x", "b"], ["a"], name="loopy"),
             helper.make_node("Relu", ["a"], ["b"])]
    return model(nodes, [vi("x", [2])], [vi("b", [2])])


HOSTILE = {
    "empty": (_write(b""), "empty"),
    "truncated": (_write(small_cnn().SerializeToString()[:100]), "cannot parse"),
    "random": (_write(np.random.default_rng(1).bytes(2048)), "ONNX"),
    "lfs": (_write(b"version https://git-lfs.github.com/spec/v1\noid sha256:ab\nsize 9\n"),
            "git lfs pull"),
    "not-a-model": (_write(numpy_helper.from_array(np.arange(9)).SerializeToString()), "ONNX"),
    "no-graph": (_write(onnx.ModelProto(ir_version=8).SerializeToString()), "no graph"),
    "future-opset": (_save(_future_opset), "upgrade onnx"),
    "cycle": (_save(_cycle), "cycle"),
    "too-deep": (_write(deeply_nested_if(300)), "nested too deeply"),
}


@pytest.mark.parametrize("case", sorted(HOSTILE))
def test_hostile_inputs_exit_2_with_one_line(tmp_path: Path, case: str) -> None:
    make, expected = HOSTILE[case]
    path = make(tmp_path)
    result = _run(str(path))
    assert result.exit_code == 2, result.output
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and str(path) in lines[0] and expected in lines[0]
    assert "Traceback" not in result.output and result.stdout == ""


@pytest.mark.parametrize("args", [["--dim", "batch"], ["--dim", "batch=-1"], ["--dim", "=3"],
                                  ["--precision", "int7"], ["--target", "no-such-target"],
                                  ["--format", "xml"]])
def test_bad_options_exit_2(cnn: Path, args: list[str]) -> None:
    result = (_run(str(cnn), "--dim", "seq=1", *args) if args[0] != "--dim"
              else _run(str(cnn), *args))
    assert result.exit_code == 2, result.output
    assert "Traceback" not in result.output


def test_missing_file_exit_2(tmp_path: Path) -> None:
    result = _run(str(tmp_path / "absent.onnx"))
    assert result.exit_code == 2 and "not found" in result.stderr


# --- the table stays readable on a large model -------------------------------------------

def _hundred_layers() -> onnx.ModelProto:
    """100 layers: 33 MatMul + Relu + custom-op triples and a last MatMul; the custom op
    (domain vendor.x) has no cost model, so 33 layers are unmodelled."""
    nodes, inits = [], []
    for k in range(33):
        inits.append(numpy_helper.from_array(np.ones((64, 64), np.float32), f"w{k}"))
        nodes += [helper.make_node("MatMul", [f"a{k}", f"w{k}"], [f"b{k}"],
                                   name=f"block{k:02d}.a.rather_long_projection_name.matmul"),
                  helper.make_node("Relu", [f"b{k}"], [f"c{k}"], name=f"block{k:02d}.relu"),
                  helper.make_node("Frobnicate", [f"c{k}"], [f"a{k + 1}"], domain="vendor.x",
                                   name=f"block{k:02d}.custom")]
    inits.append(numpy_helper.from_array(np.ones((64, 64), np.float32), "w_last"))
    nodes.append(helper.make_node("MatMul", ["a33", "w_last"], ["y"], name="head"))
    graph = helper.make_graph(nodes, "hundred", [vi("a0", [1, 64])], [vi("y", None)], inits,
                              value_info=[vi(f"a{k}", [1, 64]) for k in range(1, 34)])
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17),
                                                   helper.make_opsetid("vendor.x", 1)])


def test_table_of_a_hundred_layers_is_aligned_and_shows_coverage(tmp_path: Path) -> None:
    path = save(_hundred_layers(), tmp_path / "big.onnx")
    names = builtin_target_names()[:2]
    done = _run(str(path), *[a for n in names for a in ("-t", n)])
    assert done.exit_code == 0, done.output
    lines = done.stdout.splitlines()
    header = next(i for i, line in enumerate(lines) if line.startswith("#   layer"))
    # a named group per target, above the two header lines (labels spelled out in full)
    assert all(f"-{n}-" in lines[header - 2] for n in names)
    assert "PE" in lines[header - 1].split() and "parameter byte" in lines[header]
    rows = lines[header + 1: header + 101]
    assert [int(r.split()[0]) for r in rows] == list(range(100))
    # right-aligned numeric columns end at the same place on every row
    util_end = lines[header].index("utilization") + len("utilization")
    assert all(r[util_end - 1] != " " for r in rows)
    # 64 x 64 fp32 weights = 16 KiB; 1 x 64 x 64 MACs = 4.1k (ONNX MatMul spec)
    assert " fp32 " in rows[0]  # precision as deployed, then counts
    assert "4.10 k  8.19 k  16.0 KiB" in " ".join(rows[0].split("  ")).replace("   ", "  ") \
        or all(cell in rows[0] for cell in ("4.10 k", "8.19 k", "16.0 KiB"))
    custom = [r for r in rows if ".custom" in r]
    assert len(custom) == 33 and all(r.rstrip().endswith("!") for r in custom)
    assert all(not r.rstrip().endswith("!") for r in rows if ".custom" not in r)
    assert max(len(line) for line in rows) < 225  # names are cut, not allowed to sprawl
    out = done.stdout
    assert "total: 100 layers (67 modelled)" in out
    assert "coverage: 67/100 layers modelled" in out
    assert "unmodelled: vendor.x.Frobnicate x33" in out
    assert out.count("lower bounds: only 67/100 layers") == 2  # once per target
    assert "! layer not modelled" in out and "MACs per parameter byte = weight reuse" in out
    assert "PE util." not in out and "MACs/param B" not in out
    assert any(unit in out for unit in ("us", "ms"))


def test_dim_and_target_options_read_alike_across_commands() -> None:
    for command in ("profile", "evaluate", "baseline", "diff", "check", "audit"):
        text = CliRunner().invoke(cli, [command, "--help"]).output
        assert "-t, --target NAME|FILE" in text, command
        assert "--dim NAME=N" in text and "--precision TYPE" in text, command


def test_long_names_are_cut_in_the_middle_and_unbound_models_are_not_costed(
        tmp_path: Path) -> None:
    from gate.report.profile_text import clean

    cut = clean("block07.attention.projection.query.matmul", 20, keep_end=True)
    assert cut == "block07....ry.matmul" and len(cut) == 20
    path = save(model([helper.make_node("Relu", ["x"], ["y"], name="r")],
                      [vi("x", ["batch", 4])], [vi("y", None)]), tmp_path / "u.onnx")
    out = _run(str(path), "-t", builtin_target_names()[0]).stdout
    assert "not costed: no layer could be modelled" in out
    assert "latency 0" not in out  # never a silent zero
    assert "total: 1 layers (0 modelled), ? MACs, ? FLOPs" in out  # unknown, not 0 MACs


def test_unicode_line_separators_in_names_do_not_break_table_lines(tmp_path: Path) -> None:
    # U+2028 / U+2029 are the Unicode line and paragraph separators (categories Zl, Zp).
    nodes = [helper.make_node("Relu", ["x"], ["y"], name="a\u2028b\u2029c")]
    path = save(model(nodes, [vi("x", [1, 4])], [vi("y", [1, 4])]), tmp_path / "m.onnx")
    out = _run(str(path)).stdout
    assert "\u2028" not in out and "\u2029" not in out and "a b c" in out
