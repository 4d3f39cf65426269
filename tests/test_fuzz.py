"""Property-based fuzzing of every entry point: the gate never crashes, never passes blind.

Three generators: mutated bytes of a valid ONNX file, random graphs built with
onnx.helper (valid or not), and random YAML documents used as a policy, a
target profile and a project config. The properties: the command exits 0, 1
or 2 (never 3, never an uncaught exception), and when it exits 0 every model
was fully analysed. The normal suite runs a short pass; ``python bench/fuzz.py``
runs a long one and prints how many cases were tried.
"""

from __future__ import annotations

import json
import os
from collections import Counter
from pathlib import Path

import numpy as np
import onnx
import pytest
import yaml
from click.testing import CliRunner
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from onnx import TensorProto, helper, numpy_helper

from gate.cli import cli

EXAMPLES = int(os.environ.get("ROOFGATE_FUZZ_EXAMPLES", "15"))
FUZZ = settings(max_examples=EXAMPLES, deadline=None, derandomize=not os.environ.get(
    "ROOFGATE_FUZZ_RANDOM"), suppress_health_check=[HealthCheck.function_scoped_fixture,
                                                     HealthCheck.too_slow])
TARGET = "ws-64x64-4mib"
POLICY = str(Path(__file__).resolve().parent.parent / "gate" / "policies" / "default.yaml")
CASES: Counter[str] = Counter()  # read by bench/fuzz.py


def _seed_model_bytes() -> bytes:
    weight = numpy_helper.from_array(np.zeros((4, 3, 3, 3), np.float32), "conv.w")
    nodes = [
        helper.make_node("Conv", ["x", "conv.w"], ["c"], name="conv", pads=[1, 1, 1, 1]),
        helper.make_node("Relu", ["c"], ["r"], name="relu"),
        helper.make_node("GlobalAveragePool", ["r"], ["y"], name="pool"),
    ]
    graph = helper.make_graph(
        nodes, "seed", [helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 3, 8, 8])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 4, 1, 1])], [weight])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    return model.SerializeToString()


SEED = _seed_model_bytes()


def _run_gate(model_path: Path, out: Path, *extra: str) -> tuple[int, dict | None]:
    json_path = out / "result.json"
    if json_path.exists():
        json_path.unlink()
    result = CliRunner().invoke(
        cli, ["evaluate", str(model_path), "--target", TARGET, "--policy", POLICY,
              "--json", str(json_path), *extra])
    assert result.exit_code in (0, 1, 2), (result.exit_code, result.output, result.exception)
    assert "Traceback" not in result.output
    data = json.loads(json_path.read_text()) if json_path.exists() else None
    return result.exit_code, data


def _assert_never_blind_pass(code: int, data: dict | None) -> None:
    """Exit 0 means: a report exists, no model errors, every entry analysed and covered."""
    if code != 0:
        return
    assert data is not None, "a passing gate must have written its report"
    result = data.get("result", data)
    assert not result["errors"]
    for entry in result["entries"]:
        assert entry["head"] is not None
        assert entry["head"]["metrics"]["coverage_node_share"] == 1.0, entry["head"]["unmodelled"]


@st.composite
def mutated_bytes(draw: st.DrawFn) -> bytes:
    data = bytearray(SEED)
    for _ in range(draw(st.integers(1, 4))):
        kind = draw(st.sampled_from(["truncate", "flip", "insert", "delete"]))
        pos = draw(st.integers(0, max(0, len(data) - 1)))
        if kind == "truncate":
            del data[pos:]
        elif kind == "flip" and data:
            data[pos] ^= draw(st.integers(1, 255))
        elif kind == "insert":
            data[pos:pos] = draw(st.binary(min_size=1, max_size=8))
        elif data:
            del data[pos:pos + draw(st.integers(1, 8))]
    return bytes(data)


@FUZZ
@given(blob=mutated_bytes())
def test_mutated_onnx_bytes_never_crash(tmp_path_factory: pytest.TempPathFactory, blob: bytes) -> None:
    CASES["mutated ONNX bytes"] += 1
    folder = tmp_path_factory.mktemp("mut")
    path = folder / "model.onnx"
    path.write_bytes(blob)
    code, data = _run_gate(path, folder)
    _assert_never_blind_pass(code, data)


_UNARY = ["Relu", "Sigmoid", "Tanh", "Exp", "Abs", "Softmax", "Flatten", "Identity",
          "GlobalAveragePool", "Transpose", "MysteryOp"]
_BINARY = ["Add", "Mul", "MatMul", "Conv", "Concat", "Sub"]


@st.composite
def random_graph(draw: st.DrawFn) -> onnx.ModelProto:
    dims = draw(st.lists(st.sampled_from([1, 2, 3, 4, 8, "batch", 0]), min_size=2, max_size=4))
    tensors = ["x"]
    nodes, inits = [], []
    for i in range(draw(st.integers(1, 8))):
        a = draw(st.sampled_from(tensors))
        if draw(st.booleans()):
            op = draw(st.sampled_from(_UNARY))
            inputs = [a]
        else:
            op = draw(st.sampled_from(_BINARY))
            if draw(st.booleans()):
                shape = draw(st.lists(st.integers(1, 4), min_size=1, max_size=4))
                inits.append(numpy_helper.from_array(np.zeros(shape, np.float32), f"p{i}"))
                inputs = [a, f"p{i}"]
            else:
                inputs = [a, draw(st.sampled_from(tensors))]
        attrs = {"axis": draw(st.integers(-3, 3))} if op in ("Concat", "Softmax", "Flatten") else {}
        domain = "example.custom" if op == "MysteryOp" else ""
        nodes.append(helper.make_node(op, inputs, [f"t{i}"], name=draw(
            st.sampled_from([f"n{i}", f"<b>n{i}</b>", f"n|{i}`", f"n\r\n{i}", f"n\x01{i}"])),
            domain=domain, **attrs))
        tensors.append(f"t{i}")
    graph = helper.make_graph(
        nodes, "random", [helper.make_tensor_value_info("x", TensorProto.FLOAT, dims)],
        [helper.make_tensor_value_info(tensors[-1], TensorProto.FLOAT, None)], inits)
    opsets = [helper.make_opsetid("", 17), helper.make_opsetid("example.custom", 1)]
    return helper.make_model(graph, opset_imports=opsets)


@FUZZ
@given(model=random_graph())
def test_random_graphs_never_crash(tmp_path_factory: pytest.TempPathFactory,
                                   model: onnx.ModelProto) -> None:
    CASES["random graphs"] += 1
    folder = tmp_path_factory.mktemp("graph")
    path = folder / "model.onnx"
    path.write_bytes(model.SerializeToString())
    code, data = _run_gate(path, folder, "--dim", "batch=2")
    _assert_never_blind_pass(code, data)
    profile = CliRunner().invoke(cli, ["profile", str(path), "--format", "json"])
    assert profile.exit_code in (0, 2), (profile.output, profile.exception)


_YAML_VALUES = st.recursive(
    st.none() | st.booleans() | st.integers(-10**12, 10**12) | st.floats(allow_nan=True)
    | st.text(max_size=12) | st.sampled_from(["4 MiB", "1 GHz", "error", "min_utilization"]),
    lambda children: st.lists(children, max_size=4)
    | st.dictionaries(st.sampled_from(["id", "kind", "rules", "severity", "min", "max",
                                       "name", "clock", "pe_array", "buffers", "models",
                                       "targets", "waivers", "metric", "x"]) | st.text(max_size=6),
                      children, max_size=5),
    max_leaves=20,
)


@st.composite
def yaml_documents(draw: st.DrawFn) -> bytes:
    if draw(st.integers(0, 9)) == 0:  # sometimes raw bytes: syntax errors, bad UTF-8
        return draw(st.binary(max_size=64))
    return yaml.safe_dump(draw(_YAML_VALUES), allow_unicode=True).encode("utf-8")


@FUZZ
@given(document=yaml_documents())
def test_random_yaml_never_crashes(tmp_path_factory: pytest.TempPathFactory,
                                   monkeypatch: pytest.MonkeyPatch, document: bytes) -> None:
    CASES["random YAML documents"] += 1
    folder = tmp_path_factory.mktemp("yaml")
    monkeypatch.chdir(folder)  # audit writes its default reports below the working folder
    model = folder / "model.onnx"
    model.write_bytes(SEED)
    doc = folder / "doc.yaml"
    doc.write_bytes(document)
    runner = CliRunner()
    for args in (["evaluate", str(model), "--target", TARGET, "--policy", str(doc)],
                 ["evaluate", str(model), "--target", str(doc), "--policy", POLICY],
                 ["audit", str(model), "--config", str(doc)]):
        result = runner.invoke(cli, args)
        assert result.exit_code in (0, 1, 2), (args, result.output, result.exception)
        assert "Traceback" not in result.output
