"""Fail closed, lose nothing, leak nothing: hostile inputs through the public command line.

Every case goes through ``gate.cli.cli`` with click's ``CliRunner`` (stdout and
stderr apart), as a user or a CI job would hit it: ``roofgate evaluate`` writing
every report, ``roofgate profile``, and ``roofgate check`` in a throwaway git
repository. Models are built in code with ``onnx.helper`` (nothing downloaded).

What "fail closed" means here (docs and gate/errors.py): bad input exits 2 with
one line naming the file and the remedy, a model that cannot be analysed never
reads as a pass in any report, internal errors exit 3, no traceback without
``--debug``. Model-supplied strings are escaped in every report format.
"""

from __future__ import annotations

import json
import os
import random
import re
import subprocess
import sys
import xml.etree.ElementTree as ET
from datetime import date, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import onnx
import pytest
from click.testing import CliRunner, Result
from onnx import TensorProto, helper, numpy_helper

from gate import costmodel
from gate.cli import cli
from gate.ops import registry
from tests.gitkit import Repo
from tests.loadkit import deeply_nested_if, model, save, small_cnn, vi, weight
from tests.recordkit import HOSTILE_NAME

REPO_ROOT = Path(__file__).resolve().parents[1]
DEFAULT_POLICY = str(REPO_ROOT / "gate" / "policies" / "default.yaml")
STRICT_POLICY = str(REPO_ROOT / "gate" / "policies" / "strict.yaml")
TARGET = "ws-64x64-4mib"
ACME = helper.make_opsetid("com.acme", 1)
REPORTS = ("junit", "markdown", "json", "sarif", "html")
FILES = {"junit": "junit.xml", "markdown": "summary.md", "json": "result.json",
         "sarif": "result.sarif", "html": "report.html"}


# --- running the command line ---------------------------------------------------------

def invoke(args: list[str]) -> Result:
    return CliRunner().invoke(cli, args)


def gate(model_path: Path | str, out: Path, *, policy: str = DEFAULT_POLICY,
         extra: tuple[str, ...] = ()) -> Result:
    """``roofgate evaluate MODEL`` writing every report under ``out``, annotations on stdout."""
    args = ["evaluate", str(model_path), "--target", TARGET, "--policy", policy]
    for name in REPORTS:
        args += [f"--{name}", str(out / FILES[name])]
    return invoke([*args, "--annotations", "-", *extra])


def assert_no_traceback(result: Result) -> None:
    assert "Traceback" not in result.stdout + result.stderr
    assert result.exception is None or isinstance(result.exception, SystemExit), \
        repr(result.exception)


def error_lines(text: str, needle: str) -> list[str]:
    return [line for line in text.splitlines() if needle in line]


# --- model builders ---------------------------------------------------------------------

def _cnn_bytes() -> bytes:
    return small_cnn().SerializeToString()


def _no_graph() -> bytes:
    proto = small_cnn()
    proto.ClearField("graph")
    return proto.SerializeToString()


def _opset(version: int) -> bytes:
    proto = small_cnn()
    proto.opset_import[0].version = version
    return proto.SerializeToString()


def _ir(version: int) -> bytes:
    proto = small_cnn()
    proto.ir_version = version
    return proto.SerializeToString()


def _cyclic() -> bytes:
    nodes = [helper.make_node("Relu", ["b"], ["a"], name="r1"),
             helper.make_node("Add", ["a", "x"], ["b"], name="r2")]
    return model(nodes, [vi("x", [1, 4])], [vi("b", [1, 4])]).SerializeToString()


def _dangling() -> bytes:
    nodes = [helper.make_node("Add", ["x", "ghost"], ["y"], name="dang")]
    return model(nodes, [vi("x", [1, 4])], [vi("y", [1, 4])]).SerializeToString()


def _truncated(fraction: float) -> bytes:
    data = _cnn_bytes()
    return data[:max(1, int(len(data) * fraction))]


def _after_graph() -> bytes:
    """Cut exactly at a field boundary: the graph parses, the opset list is gone."""
    proto = small_cnn()
    proto.ClearField("opset_import")
    return proto.SerializeToString()


LFS_POINTER = (b"version https://git-lfs.github.com/spec/v1\n"
               b"oid sha256:" + b"ab" * 32 + b"\nsize 4096\n")

# (id, bytes builder, a phrase of the remedy the error line must carry)
BAD_MODELS: list[tuple[str, Any, str]] = [
    ("empty", lambda: b"", "re-export"),
    ("truncated-1-byte", lambda: _cnn_bytes()[:1], "re-export"),
    ("truncated-10pct", lambda: _truncated(0.10), "re-export"),
    ("truncated-half", lambda: _truncated(0.50), "re-export"),
    ("truncated-90pct", lambda: _truncated(0.90), "re-export"),
    ("truncated-last-byte", lambda: _cnn_bytes()[:-1], "re-export"),
    ("truncated-at-field-boundary", _after_graph, "re-export"),
    ("random-bytes", lambda: random.Random(7).randbytes(2048), "re-export"),
    ("random-bytes-small", lambda: random.Random(11).randbytes(17), "re-export"),
    ("git-lfs-pointer", lambda: LFS_POINTER, "git lfs pull"),
    ("tensor-not-model", lambda: numpy_helper.from_array(
        np.zeros(64, np.float32), "t").SerializeToString(), "re-export"),
    ("node-not-model", lambda: helper.make_node("Relu", ["x"], ["y"]).SerializeToString(),
     "re-export"),
    ("no-graph", _no_graph, "re-export"),
    ("opset-too-new", lambda: _opset(onnx.defs.onnx_opset_version() + 50), "upgrade onnx"),
    ("ir-too-new", lambda: _ir(onnx.IR_VERSION + 5), "upgrade onnx"),
    ("cyclic", _cyclic, "re-export"),
    ("dangling-edge", _dangling, "re-export"),
    ("nested-500-deep", lambda: deeply_nested_if(500), "re-export"),
    ("negative-dim", lambda: _negative_dim().SerializeToString(), "re-export"),
]


@pytest.fixture(scope="module")
def bad_models(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    folder = tmp_path_factory.mktemp("bad")
    paths = {}
    for case, build, _ in BAD_MODELS:
        path = folder / f"{case}.onnx"
        path.write_bytes(build())
        paths[case] = path
    return paths


# --- unanalysable models: gate -----------------------------------------------------------

@pytest.mark.parametrize(("case", "remedy"), [(c, r) for c, _, r in BAD_MODELS],
                         ids=[c for c, _, _ in BAD_MODELS])
def test_gate_fails_closed_on_unanalysable_model(bad_models, tmp_path, case, remedy) -> None:
    path = bad_models[case]
    result = gate(path, tmp_path)
    assert result.exit_code == 2, (case, result.stdout, result.stderr)
    assert_no_traceback(result)
    # One line on stderr names the file and says what to do.
    lines = error_lines(result.stderr, str(path))
    assert len(lines) == 1, result.stderr
    assert "ERROR" in lines[0] and remedy in lines[0], lines[0]
    _assert_reports_show_failure(tmp_path, path)
    # Annotations: one ::error per unanalysable model, each a single line.
    annotations = result.stdout.splitlines()
    assert annotations and all(line.startswith("::") for line in annotations)
    assert any(line.startswith("::error ") and path.name in line for line in annotations)


def _assert_reports_show_failure(out: Path, path: Path) -> None:
    """No report may read as a success when the model was not analysed."""
    junit = ET.parse(out / FILES["junit"]).getroot()
    assert int(junit.get("errors", "0")) + int(junit.get("failures", "0")) >= 1
    assert any(path.name in (case.get("name", "") + case.get("classname", ""))
               for case in junit.iter("testcase"))
    data = json.loads((out / FILES["json"]).read_text(encoding="utf-8"))
    assert data["exit_code"] == 2
    assert [e["model"] for e in data["result"]["errors"]] == [str(path)]
    markdown = (out / FILES["markdown"]).read_text(encoding="utf-8")
    headline = next(line for line in markdown.splitlines() if line.startswith("## "))
    assert "could not" in headline and "pass" not in headline.lower(), headline
    assert path.name in markdown
    sarif = json.loads((out / FILES["sarif"]).read_text(encoding="utf-8"))
    levels = [r.get("level") for run in sarif["runs"] for r in run.get("results", [])]
    assert "error" in levels
    assert (out / FILES["html"]).stat().st_size > 0


def test_unanalysable_model_passes_only_when_policy_allows_it(bad_models, tmp_path) -> None:
    policy = tmp_path / "lenient.yaml"
    policy.write_text(Path(DEFAULT_POLICY).read_text(encoding="utf-8").replace(
        "allow_unanalysable: false", "allow_unanalysable: true"), encoding="utf-8")
    result = gate(bad_models["truncated-half"], tmp_path / "out", policy=str(policy))
    assert result.exit_code == 0, result.stderr
    assert "allowed by policy" in result.stderr
    data = json.loads((tmp_path / "out" / FILES["json"]).read_text(encoding="utf-8"))
    assert data["result"]["errors"] and data["result"]["allow_errors"] is True  # still reported


def test_missing_model_and_directory_are_bad_input(tmp_path) -> None:
    for path, phrase in ((tmp_path / "absent.onnx", "check the path"),
                         (tmp_path, "pass the .onnx file")):
        result = gate(path, tmp_path / "out")
        assert result.exit_code == 2
        assert_no_traceback(result)
        (line,) = error_lines(result.stderr, "ERROR")
        assert str(path) in line and phrase in line


# --- unanalysable models: profile --------------------------------------------------------

@pytest.mark.parametrize(("case", "remedy"), [(c, r) for c, _, r in BAD_MODELS],
                         ids=[c for c, _, _ in BAD_MODELS])
def test_profile_refuses_with_one_line(bad_models, case, remedy) -> None:
    path = bad_models[case]
    result = invoke(["profile", str(path), "--target", TARGET, "--format", "json"])
    assert result.exit_code == 2, (case, result.stdout, result.stderr)
    assert_no_traceback(result)
    assert result.stdout == ""  # nothing that a pipe could take for a profile
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and str(path) in lines[0] and remedy in lines[0], lines


# --- partly modelled models never pass silently ------------------------------------------

def _custom_domain() -> onnx.ModelProto:
    nodes = [helper.make_node("Conv", ["x", "w"], ["c"], name="conv"),
             helper.make_node("FancyOp", ["c"], ["y"], domain="com.acme", name="fancy")]
    return model(nodes, [vi("x", [1, 3, 32, 32])], [vi("y", None)], [weight("w", [8, 3, 3, 3])],
                 extra_opsets=[ACME])


def _never_shaped() -> onnx.ModelProto:
    """A custom op whose output no inference can shape, feeding modelled ops."""
    nodes = [helper.make_node("Mystery", ["x"], ["u"], domain="com.acme", name="mystery"),
             helper.make_node("MatMul", ["u", "w"], ["y"], name="after_mystery")]
    return model(nodes, [vi("x", [1, 64])], [vi("y", None)], [weight("w", [64, 64])],
                 extra_opsets=[ACME])


def _negative_dim() -> onnx.ModelProto:
    nodes = [helper.make_node("MatMul", ["x", "w"], ["y"], name="mm")]
    return model(nodes, [vi("x", [1, -3]), vi("w", [-3, 4])], [vi("y", None)])


def _bad_conv(**attrs: Any) -> onnx.ModelProto:
    """A Conv whose attributes contradict the ONNX spec, though onnx still infers a shape."""
    return model([helper.make_node("Conv", ["x", "w"], ["y"], name="cv", **attrs)],
                 [vi("x", [1, 3, 8, 8])], [vi("y", None)], [weight("w", [4, 3, 3, 3])])


def _bad_pool() -> onnx.ModelProto:
    return model([helper.make_node("MaxPool", ["x"], ["y"], name="mp", kernel_shape=[2, 2],
                                   auto_pad="<img>")], [vi("x", [1, 3, 8, 8])], [vi("y", None)])


UNMODELLED = {
    "conv-unknown-auto-pad": (lambda: _bad_conv(auto_pad="<img src=x>"), "auto_pad="),
    "conv-kernel-shape-mismatch": (lambda: _bad_conv(kernel_shape=[5, 5]), "kernel_shape"),
    "pool-unknown-auto-pad": (_bad_pool, "auto_pad="),
    "custom-domain": (_custom_domain, "FancyOp"),
    "never-shaped": (_never_shaped, "Mystery"),
    "unbound-symbolic-dim": (lambda: small_cnn(batch="N"), "--dim N="),
}


@pytest.mark.parametrize("case", sorted(UNMODELLED))
def test_unmodelled_work_fails_the_default_policy(tmp_path, case) -> None:
    build, reason = UNMODELLED[case]
    path = save(build(), tmp_path / f"{case}.onnx")
    result = gate(path, tmp_path / "out")
    assert result.exit_code == 1, (result.stdout, result.stderr)
    assert_no_traceback(result)
    data = json.loads((tmp_path / "out" / FILES["json"]).read_text(encoding="utf-8"))
    (entry,) = data["result"]["entries"]
    coverage = next(v for v in entry["verdicts"] if v["rule_id"] == "coverage")
    assert coverage["status"] == "fail"
    assert reason in json.dumps(coverage)  # says which op / dim, so the user can act
    junit = ET.parse(tmp_path / "out" / FILES["junit"]).getroot()
    assert any(case_.get("name", "").startswith("coverage") and case_.find("failure") is not None
               for case_ in junit.iter("testcase"))


def test_unmodelled_sliver_is_reported_and_strict_policy_fails_it(tmp_path) -> None:
    """The default policy tolerates 5% of work / 20% of nodes unmodelled (its own choice,
    written in the file); the tool must still say the totals are a lower bound, and the
    strict policy (0%) must fail the same model."""
    nodes = [helper.make_node("Conv", ["x", "w"], ["c"], name="conv", pads=[1, 1, 1, 1])]
    nodes += [helper.make_node("Conv", [f"c{i}" if i else "c", "w"], [f"c{i + 1}"],
                               name=f"conv{i}", pads=[1, 1, 1, 1]) for i in range(6)]
    nodes.append(helper.make_node("Tiny", ["t"], ["u"], domain="com.acme", name="tiny"))
    proto = model(nodes, [vi("x", [1, 64, 32, 32]), vi("t", [1, 1])],
                  [vi("c6", None), vi("u", [1, 1])], [weight("w", [64, 64, 3, 3])],
                  extra_opsets=[ACME])
    path = save(proto, tmp_path / "sliver.onnx")
    lenient = gate(path, tmp_path / "default")
    assert lenient.exit_code == 0, lenient.stderr
    markdown = (tmp_path / "default" / FILES["markdown"]).read_text(encoding="utf-8")
    assert "unmodelled" in markdown and "lower bound" in markdown
    data = json.loads((tmp_path / "default" / FILES["json"]).read_text(encoding="utf-8"))
    assert [u["op_type"] for u in data["result"]["entries"][0]["head"]["unmodelled"]] == ["Tiny"]
    strict = gate(path, tmp_path / "strict", policy=STRICT_POLICY)
    assert strict.exit_code == 1, strict.stderr


# --- dims: zero, huge; counts stay exact Python ints --------------------------------------

def _head(out: Path) -> dict[str, Any]:
    data = json.loads((out / FILES["json"]).read_text(encoding="utf-8"))
    (entry,) = data["result"]["entries"]
    return entry["head"]


def _strict_json(text: str) -> Any:
    """json.loads that refuses NaN and Infinity (not JSON; many parsers reject them)."""
    def refuse(constant: str) -> None:
        raise AssertionError(f"non-JSON constant {constant}")
    return json.loads(text, parse_constant=refuse)


def test_zero_dims_count_zero_without_crashing(tmp_path) -> None:
    """Empty tensors inside the graph (a Slice to nothing, weights with a 0 dim) cost 0
    MACs, and 0/0 utilization or intensity never becomes NaN. (A graph input declared
    with size 0 is taken as unknown instead: tests/test_never_unchecked.py.)"""
    ints = {name: numpy_helper.from_array(np.array([v], np.int64), name)
            for name, v in (("start", 0), ("end", 0), ("axis", 1))}
    nodes = [helper.make_node("Slice", ["x", "start", "end", "axis"], ["xs"], name="cut"),
             helper.make_node("MatMul", ["xs", "w"], ["y"], name="mm"),
             helper.make_node("Softmax", ["xs"], ["s"], name="sm")]
    proto = model(nodes, [vi("x", [1, 16])], [vi("y", None), vi("s", None)],
                  [weight("w", [0, 8]), *ints.values()])
    path = save(proto, tmp_path / "zero.onnx")
    result = gate(path, tmp_path / "out")
    assert result.exit_code in (0, 1)
    assert_no_traceback(result)
    assert _head(tmp_path / "out")["metrics"]["macs"] == 0
    for name in ("json", "sarif"):  # 0/0 utilization or intensity must not become NaN
        _strict_json((tmp_path / "out" / FILES[name]).read_text(encoding="utf-8"))
    profiled = invoke(["profile", str(path), "--format", "json", "--target", TARGET])
    assert profiled.exit_code == 0
    layers = _strict_json(profiled.stdout)["targets"][0]["layers"]
    assert {layer["name"]: layer["modelled"] for layer in layers} == {
        "cut": True, "mm": True, "sm": True}  # costed (at zero), not left unknown


@pytest.mark.parametrize("big", [2**62, 2**63 - 1])
def test_astronomical_dims_count_exactly(tmp_path, big) -> None:
    # MatMul MACs = M x K x N (ONNX operator spec, MatMul: numpy matmul semantics).
    proto = model([helper.make_node("MatMul", ["x", "w"], ["y"], name="mm")],
                  [vi("x", [1, big]), vi("w", [big, 4])], [vi("y", None)])
    result = gate(save(proto, tmp_path / "big.onnx"), tmp_path / "out")
    assert result.exit_code in (0, 1), result.stderr
    assert_no_traceback(result)
    raw = (tmp_path / "out" / FILES["json"]).read_text(encoding="utf-8")
    macs = _head(tmp_path / "out")["metrics"]["macs"]
    assert isinstance(macs, int) and macs == big * 4  # beyond float precision: exact int
    assert str(big * 4) in raw  # written as an integer literal, no exponent


def test_huge_conv_counts_exactly(tmp_path) -> None:
    # Conv MACs = N x Cout x Hout x Wout x Cin x kH x kW, Hout = H - k + 1 without padding
    # (ONNX operator spec, Conv output shape).
    c, h = 2**31, 2**20
    proto = model([helper.make_node("Conv", ["x", "w"], ["y"], name="cv")],
                  [vi("x", [1, c, h, h]), vi("w", [c, c, 3, 3])], [vi("y", None)])
    gate(save(proto, tmp_path / "conv.onnx"), tmp_path / "out")
    assert _head(tmp_path / "out")["metrics"]["macs"] == c * (h - 2) ** 2 * c * 9


def test_thousands_of_nodes_sharing_one_initializer_count_it_once(tmp_path) -> None:
    count = 3000
    nodes = [helper.make_node("MatMul", [f"h{i}", "w"], [f"h{i + 1}"], name=f"mm{i}")
             for i in range(count)]
    proto = model(nodes, [vi("h0", [1, 64])], [vi(f"h{count}", [1, 64])], [weight("w", [64, 64])])
    result = gate(save(proto, tmp_path / "shared.onnx"), tmp_path / "out")
    assert result.exit_code in (0, 1), result.stderr
    metrics = _head(tmp_path / "out")["metrics"]
    assert metrics["param_bytes"] == 64 * 64 * 4  # one fp32 tensor, stored once
    assert metrics["macs"] == count * 64 * 64


# --- external data pointing outside the model's folder -------------------------------------

_OPENED: list[str] | None = None


def _audit(event: str, args: tuple[Any, ...]) -> None:
    if _OPENED is not None and event == "open" and args and isinstance(args[0], (str, bytes)):
        _OPENED.append(os.fsdecode(args[0]))


sys.addaudithook(_audit)  # records only while a test sets _OPENED


@pytest.mark.parametrize(("location", "phrase"), [
    ("../secret.bin", "outside the model's folder"), ("/etc/passwd", "outside the model's folder"),
    ("sub/../../secret.bin", "outside the model's folder"),
    ("a\x00b", "unusable external-data location"), ("", "unusable external-data location")])
def test_external_data_outside_the_folder_is_reported_never_opened(tmp_path, location,
                                                                   phrase) -> None:
    global _OPENED
    folder = tmp_path / "models"
    folder.mkdir()
    secret = tmp_path / "secret.bin"
    secret.write_bytes(b"\0" * 64)
    tensor = TensorProto(name="w", data_type=TensorProto.FLOAT, dims=[4, 4],
                         data_location=TensorProto.EXTERNAL)
    for key, value in (("location", location), ("offset", "0"), ("length", "64")):
        tensor.external_data.add(key=key, value=value)
    proto = model([helper.make_node("MatMul", ["x", "w"], ["y"], name="mm")],
                  [vi("x", [1, 4])], [vi("y", [1, 4])], [tensor])
    path = folder / "m.onnx"
    path.write_bytes(proto.SerializeToString())
    _OPENED = []
    try:
        result = gate(path, tmp_path / "out")
        profiled = invoke(["profile", str(path)])
    finally:
        opened, _OPENED = _OPENED, None
    assert not [p for p in opened if Path(p).name in ("secret.bin", "passwd")], opened
    assert result.exit_code in (0, 1) and profiled.exit_code == 0
    assert phrase in profiled.stderr and repr(location)[1:-1] in profiled.stderr
    for name in ("markdown", "json"):
        text = (tmp_path / "out" / FILES[name]).read_text(encoding="utf-8")
        assert phrase in text


# --- YAML ----------------------------------------------------------------------------------

def _bomb(levels: int = 9) -> str:
    """Billion laughs: nine mappings, each holding nine aliases of the one before (9**9
    leaves if expanded), as lists (a*) and as mappings (m*)."""
    keys = "abcdefghi"
    lines = ["a0: &a0 [" + ", ".join(['"lol"'] * 9) + "]",
             "m0: &m0 {" + ", ".join(f"{k}: lol" for k in keys) + "}"]
    for i in range(1, levels):
        lines.append(f"a{i}: &a{i} [" + ", ".join([f"*a{i - 1}"] * 9) + "]")
        lines.append(f"m{i}: &m{i} {{" + ", ".join(f"{k}: *m{i - 1}" for k in keys) + "}")
    return "\n".join(lines) + "\nversion: 1\nname: x\n"


BOMB_RULE = "rules:\n  - {id: a, kind: fits_in_buffer, check: params}\n"
BOMBS = {
    "op-types": "rules:\n  - {id: a, kind: max_unmodelled, max_node_share: 0%, op_types: *a8}\n",
    "rule-list": "rules: *a8\n",
    "rule-mapping": "rules:\n  - *m8\n",
    "merge-key": "rules:\n  - <<: *m8\n    id: a\n    kind: fits_in_buffer\n",
    "waivers": BOMB_RULE + "waivers: [*m8, *m8, *a8]\n",
    "description": "description: *m8\n" + BOMB_RULE,
}


@pytest.mark.parametrize("case", sorted(BOMBS))
def test_alias_bomb_policy_is_refused_without_expanding(tmp_path, case) -> None:
    import tracemalloc
    policy = tmp_path / "bomb.yaml"
    policy.write_text(_bomb() + BOMBS[case], encoding="utf-8")
    good = save(small_cnn(), tmp_path / "good.onnx")
    tracemalloc.start()
    try:
        result = gate(good, tmp_path / "out", policy=str(policy))
        peak_bytes = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert result.exit_code == 2, result.stderr
    assert_no_traceback(result)
    assert peak_bytes < 64 * 1024**2  # 9**9 expanded strings would need gigabytes
    lines = result.stderr.strip().splitlines()
    assert lines and all(re.search(re.escape(str(policy)) + r":\d+:", line) for line in lines)


YAML_CASES = {
    "syntax": ("version: 1\nname: x\nrules:\n  - {id: a, kind: fits_in_buffer\n",
               ":5:", "syntax error"),
    "wrong-type": (("version: 1\nname: x\nrules:\n  - id: a\n    kind: fits_in_buffer\n"
                   "    check: params\n    severity: 3\n"), ":7: rules[0].severity:",
                   "not one of error, warning"),
    "unknown-key": (("version: 1\nname: x\nrules:\n  - id: a\n    kind: fits_in_buffer\n"
                    "    chek: params\n"), ":6: rules[0].chek:", "did you mean 'check'?"),
    "duplicate-rule-id": (("version: 1\nname: x\nrules:\n  - {id: a, kind: fits_in_buffer, "
                          "check: params}\n  - {id: a, kind: fits_in_buffer, check: both}\n"),
                          ":5: rules[1].id:", "duplicate rule id 'a'"),
    "python-tag": (("version: 1\nname: !!python/object/apply:os.system [\"exit 1\"]\n"
                   "rules: []\n"), ":2:", "python/object/apply:os.system' is not supported"),
    "non-utf8": (b"version: 1\nname: caf\xe9\nrules: []\n", ":2:", "save the file as UTF-8"),
    "not-a-mapping": ("- just\n- a list\n", ":1:", "mapping"),
    "nul-character": ("version: 1\nname: x\x00\nrules: []\n", ":2:", "remove it"),
    "utf-16": ("version: 1\nname: x\nrules: []\n".encode("utf-16"), ":1:",
               "save the file as UTF-8"),
    "nested-5000-deep": ("version: 1\nname: x\nrules: " + "[" * 5000 + "]" * 5000 + "\n", "",
                         "less nesting"),
    "too-large": ("version: 1\nname: x\n" + "#" * (5 * 1024 * 1024) + "\nrules: []\n", "",
                  "is it YAML?"),
    "unitless-quantity": (("version: 1\nname: x\nrules:\n  - {id: a, kind: metric_limit, "
                          "metric: macs, max: lots}\n"), ":4: rules[0].max:", "expected a number"),
    "nan-threshold": ("version: 1\nname: x\nrules:\n  - {id: a, kind: max_latency, max: .nan}\n",
                      ":4: rules[0].max:", "finite"),
}


@pytest.mark.parametrize("case", sorted(YAML_CASES))
def test_bad_policy_yaml_is_refused_with_file_line_and_key(bad_models, tmp_path, case) -> None:
    text, where, phrase = YAML_CASES[case]
    policy = tmp_path / f"{case}.yaml"
    policy.write_bytes(text if isinstance(text, bytes) else text.encode("utf-8"))
    good = save(small_cnn(), tmp_path / "good.onnx")
    result = gate(good, tmp_path / "out", policy=str(policy))
    assert result.exit_code == 2, (result.stdout, result.stderr)
    assert_no_traceback(result)
    assert result.stdout == ""  # no annotations: nothing was judged
    lines = result.stderr.strip().splitlines()
    assert lines and all(str(policy) in line for line in lines), lines
    assert any(where in line and phrase in line for line in lines), lines
    assert not (tmp_path / "out").exists()  # no report that could read as anything


def test_bad_target_yaml_is_refused(tmp_path) -> None:
    target = tmp_path / "t.yaml"
    target.write_text("name: t\nkind: systolic\npe_rowz: 8\n", encoding="utf-8")
    result = invoke(["profile", str(save(small_cnn(), tmp_path / "g.onnx")),
                     "--target", str(target)])
    assert result.exit_code == 2
    assert_no_traceback(result)
    assert result.stderr.strip() and all(str(target) in line
                                         for line in result.stderr.strip().splitlines())


# --- hostile names: every format ------------------------------------------------------------

NAME = HOSTILE_NAME + " | x<details><summary>pwn</summary>\v\x7f\u2028"
SECOND = "r|`<img src=x onerror=alert(2)>`\n::error::forged"


@pytest.fixture(scope="module")
def hostile_run(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Result]:
    """A model whose failing layer, second layer and graph carry hostile names, in a file
    whose own name is hostile too."""
    folder = tmp_path_factory.mktemp("hostile")
    nodes = [helper.make_node("MatMul", ["x", "w"], ["y"], name=NAME),
             helper.make_node("FancyOp", ["y"], ["z"], domain="com.acme", name=SECOND)]
    proto = model(nodes, [vi("x", [1, 2048])], [vi("z", None)], [weight("w", [2048, 2048])],
                  name="g<details>\x01|`x`", extra_opsets=[ACME])
    path = save(proto, folder / "m|`<img src=x onerror=1>`\n,x=::.onnx")
    out = folder / "out"
    return out, gate(path, out)


def test_hostile_run_fails_cleanly(hostile_run) -> None:
    _, result = hostile_run
    assert result.exit_code == 1, result.stderr
    assert_no_traceback(result)


def test_hostile_names_junit_is_well_formed(hostile_run) -> None:
    out, _ = hostile_run
    root = ET.parse(out / FILES["junit"]).getroot()  # raises on XML-invalid characters
    text = ET.tostring(root, encoding="unicode")
    assert "onerror=alert(1)" in text  # the name is there, as text
    assert not any(el.tag in ("img", "details", "summary") for el in root.iter())
    raw = (out / FILES["junit"]).read_text(encoding="utf-8")
    assert not re.search(r"[\x00-\x08\x0b\x0c\x0e-\x1f]", raw)


def test_hostile_names_markdown_injects_nothing(hostile_run) -> None:
    out, _ = hostile_run
    markdown = (out / FILES["markdown"]).read_text(encoding="utf-8")
    assert "onerror" in markdown  # shown, escaped
    assert "<img" not in markdown and "<summary>pwn" not in markdown
    for line in markdown.splitlines():
        if "<details" in line or "</details" in line:
            assert line.strip() in ("<details>", "</details>"), line  # only our own
    assert markdown.count("<details>") == markdown.count("</details>")
    assert not re.search(r"[\x00-\x08\x0b\x0c\x0e-\x1f\x7f\x85\u2028]", markdown)
    _assert_table_rows_keep_their_columns(markdown)


def _assert_table_rows_keep_their_columns(markdown: str) -> None:
    """Every row of a table has as many unescaped pipes as its header."""
    header_cells = None
    for line in markdown.splitlines():
        if not line.startswith("|"):
            header_cells = None
            continue
        cells = len(re.findall(r"(?<!\\)\|", line))
        if header_cells is None:
            header_cells = cells
        assert cells == header_cells, line


def test_hostile_names_json_round_trips_exactly(hostile_run) -> None:
    out, _ = hostile_run
    head = _head(out)
    assert [layer["name"] for layer in head["layers"]] == [NAME, SECOND]
    assert head["model_name"] == "g<details>\x01|`x`"
    findings = [f["layer"] for v in json.loads((out / FILES["json"]).read_text(
        encoding="utf-8"))["result"]["entries"][0]["verdicts"] for f in v["findings"]]
    assert NAME in findings


def test_hostile_names_sarif_and_html(hostile_run) -> None:
    out, _ = hostile_run
    sarif = (out / FILES["sarif"]).read_text(encoding="utf-8")
    assert "onerror" in json.dumps(json.loads(sarif))
    uris = re.findall(r'"uri": "([^"]*)"', sarif)
    # artifact locations are URI references (SARIF 2.1.0 3.4.3, RFC 3986): no raw spaces,
    # newlines, pipes, backticks or angle brackets
    assert uris and all(re.fullmatch(r"[A-Za-z0-9\-._~:/?#\[\]@!$&'()*+,;=%]*", u) for u in uris)
    html = (out / FILES["html"]).read_text(encoding="utf-8")
    assert "onerror" in html
    assert "<img src=x" not in html and "<summary>pwn" not in html and "</details>@" not in html


def test_hostile_names_annotations_stay_one_line_each(hostile_run) -> None:
    _, result = hostile_run
    lines = result.stdout.splitlines()
    assert lines and all(re.match(r"::(error|warning|notice) ", line) for line in lines), lines
    assert not any(line.startswith("::error::forged") for line in lines)
    for line in lines:
        properties = line.split("::")[1]
        assert "\n" not in properties and "\r" not in properties
        # property values escape ',' and ':' so a file name cannot add a property
        assert properties.count("file=") == 1 and ",x=" not in properties


# --- determinism -----------------------------------------------------------------------------

def test_same_inputs_give_byte_identical_reports(tmp_path, bad_models) -> None:
    good = save(small_cnn(), tmp_path / "good.onnx")
    hostile = save(model([helper.make_node("MatMul", ["x", "w"], ["y"], name=NAME)],
                         [vi("x", [1, 2048])], [vi("y", None)], [weight("w", [2048, 2048])]),
                   tmp_path / "hostile.onnx")
    outputs = []
    for run in ("one", "two"):
        out = tmp_path / run
        args = ["evaluate", str(good), str(hostile), str(bad_models["truncated-half"]),
                "-t", TARGET, "-t", "os-16x16-512kib", "-p", DEFAULT_POLICY,
                "--date", "2026-06-01", "--annotations", str(out / "annotations.txt")]
        for name in REPORTS:
            args += [f"--{name}", str(out / FILES[name])]
        result = invoke(args)
        assert result.exit_code == 2, result.stderr
        outputs.append(out)
    for name in ("json", "sarif"):
        _strict_json((outputs[0] / FILES[name]).read_text(encoding="utf-8"))
    for name in [*FILES.values(), "annotations.txt"]:
        first, second = (o / name for o in outputs)
        assert first.read_bytes() == second.read_bytes(), name
        assert str(outputs[0]) not in first.read_text(encoding="utf-8")  # no own path


def test_baseline_snapshot_is_byte_identical(tmp_path) -> None:
    path = save(small_cnn(), tmp_path / "m.onnx")
    for name in ("a.json", "b.json"):
        result = invoke(["baseline", str(path), "-t", TARGET, "-t", "vec-dsp-128",
                         "-o", str(tmp_path / name)])
        assert result.exit_code == 0, result.stderr
    assert (tmp_path / "a.json").read_bytes() == (tmp_path / "b.json").read_bytes()
    _strict_json((tmp_path / "a.json").read_text(encoding="utf-8"))


@pytest.mark.parametrize("case", ["empty", "git-lfs-pointer", "cyclic", "opset-too-new"])
def test_baseline_and_diff_refuse_unanalysable_models(bad_models, tmp_path, case) -> None:
    path = bad_models[case]
    good = save(small_cnn(), tmp_path / "good.onnx")
    snapshot = tmp_path / "snap.json"
    for args in (["baseline", str(path), "-t", TARGET, "-o", str(snapshot)],
                 ["diff", str(good), str(path), "-t", TARGET]):
        result = invoke(args)
        assert result.exit_code == 2, (args, result.stdout, result.stderr)
        assert_no_traceback(result)
        (line,) = result.stderr.strip().splitlines()
        assert str(path) in line, line
    assert not snapshot.exists()  # a partial baseline would hide later regressions


# --- internal errors and --debug ---------------------------------------------------------------

def _crash(*args: object, **kwargs: object) -> Any:
    raise ZeroDivisionError("simulated bug")


def test_internal_error_exits_3_with_one_line_and_no_traceback(tmp_path, monkeypatch) -> None:
    monkeypatch.setattr(costmodel, "cost_model", _crash)
    path = save(small_cnn(), tmp_path / "m.onnx")
    result = gate(path, tmp_path / "out")
    assert result.exit_code == 3
    assert_no_traceback(result)
    (line,) = result.stderr.strip().splitlines()
    assert "internal error" in line and "--debug" in line and "ZeroDivisionError" in line
    assert not (tmp_path / "out" / FILES["junit"]).exists()  # no report that reads as a verdict


def test_cost_function_crash_is_internal_not_bad_input(tmp_path, monkeypatch) -> None:
    """A bug in an op's cost function is roofgate's fault (exit 3), not the model's (2)."""
    monkeypatch.setitem(registry._REGISTRY, ("", "Conv"), _crash)
    path = save(small_cnn(), tmp_path / "m.onnx")
    profiled = invoke(["profile", str(path)])
    assert profiled.exit_code == 3 and "Conv" in profiled.stderr
    assert_no_traceback(profiled)
    gated = gate(path, tmp_path / "out")
    assert gated.exit_code == 3, gated.stderr  # not "model could not be analysed" (2)


_DEBUG_SCRIPT = """
import sys
import gate.costmodel
def crash(*args, **kwargs):
    raise ZeroDivisionError("simulated bug")
gate.costmodel.cost_model = crash
from gate.cli import main
sys.argv = ["roofgate", *sys.argv[1:]]
main()
"""


@pytest.mark.parametrize("debug", [False, True])
def test_debug_shows_the_traceback_and_normal_runs_do_not(tmp_path, debug) -> None:
    path = save(small_cnn(), tmp_path / "m.onnx")
    args = [*(["--debug"] if debug else []), "evaluate", str(path), "-t", TARGET,
            "-p", DEFAULT_POLICY]
    done = subprocess.run([sys.executable, "-c", _DEBUG_SCRIPT, *args], capture_output=True,
                          text=True, timeout=60, shell=False, check=False, cwd=tmp_path)
    assert ("Traceback" in done.stderr) is debug, done.stderr
    assert "ZeroDivisionError" in done.stderr
    assert done.returncode not in (0, 2)  # never a pass, never blamed on the input
    if not debug:
        assert done.returncode == 3


# --- closed standard streams ---------------------------------------------------------------
# A launcher may start roofgate with stdin, stdout or stderr closed (``2>&-``), or with one
# of them holding a file it opened read-only since (a shell reading a wrapper script).
# Python then leaves None in sys.stderr (or a stream that cannot be written): the first
# progress line crashed a passing audit into exit 3 (closed) or exit 1, "a rule failed",
# with no message at all (read-only, as a pyenv shim leaves it).

def _run_with_fds(fds: dict[int, str], args: list[str], cwd: Path) -> subprocess.CompletedProcess[str]:
    """``roofgate ARGS`` in a child whose descriptors ``fds`` are 'closed' or 'read-only'
    (the others captured)."""
    def prepare() -> None:
        for fd, how in fds.items():
            os.close(fd)
            if how == "read-only":
                opened = os.open(sys.executable, os.O_RDONLY)
                if opened != fd:
                    os.dup2(opened, fd)
                    os.close(opened)

    return subprocess.run([sys.executable, "-c", "from gate.cli import main; main()", *args],
                          capture_output=True, text=True, timeout=120, check=False, cwd=cwd,
                          preexec_fn=prepare)


@pytest.mark.parametrize("how", ["closed", "read-only"])
def test_a_closed_stderr_keeps_every_exit_code_and_report(tmp_path, how) -> None:
    """``audit`` writes progress to stderr, which crashed the run (exit 3 or 1); now each
    verdict keeps its own exit code."""
    (tmp_path / "zoo").mkdir()
    save(small_cnn(), tmp_path / "zoo" / "m.onnx")
    common = ["-t", TARGET, "-p", DEFAULT_POLICY]
    passed = _run_with_fds({2: how}, ["audit", "zoo", *common, "--json", "r.json"], tmp_path)
    assert passed.returncode == 0, passed.stdout
    assert json.loads((tmp_path / "r.json").read_text())["summary"]["status"] == "passed"
    assert "PASSED" in passed.stdout
    missing = _run_with_fds({2: how}, ["audit", "nowhere", *common], tmp_path)
    assert missing.returncode == 2
    failed = _run_with_fds({2: how}, ["audit", "zoo", "-t", TARGET, "-p",
                                      str(_write_policy(tmp_path))], tmp_path)
    assert failed.returncode == 1, failed.stdout
    assert "FAILED" in failed.stdout


def _write_policy(folder: Path) -> Path:
    """A policy no model can meet (utilization of every layer at least 100%)."""
    policy = folder / "strict.yaml"
    policy.write_text("version: 1\nname: strict\nrules:\n  - kind: min_utilization\n"
                      "    id: all-busy\n    min: 1.0\n", encoding="utf-8")
    return policy


@pytest.mark.parametrize("how", ["closed", "read-only"])
def test_a_closed_stdout_is_exit_2_with_the_reason_and_a_closed_stdin_is_fine(
        tmp_path, how) -> None:
    path = save(small_cnn(), tmp_path / "m.onnx")
    args = ["evaluate", str(path), "-t", TARGET, "-p", DEFAULT_POLICY]
    no_stdout = _run_with_fds({1: how}, args, tmp_path)
    assert no_stdout.returncode == 2
    assert "standard output is closed" in no_stdout.stderr
    assert_no_traceback_text(no_stdout.stderr)
    no_stdin = _run_with_fds({0: "closed"}, args, tmp_path)
    assert no_stdin.returncode == 0, no_stdin.stderr


def assert_no_traceback_text(text: str) -> None:
    assert "Traceback" not in text, text


# --- safe loaders ------------------------------------------------------------------------------

FORBIDDEN = [r"\bpickle\b", r"(?<![\w.])eval\(", r"(?<![\w.])exec\(", r"yaml\.load\(",
             r"yaml\.unsafe_load", r"yaml\.full_load", r"shell\s*=\s*True", r"os\.system\(",
             r"os\.popen\(", r"\bmarshal\b", r"\bshelve\b", r"allow_pickle\s*=\s*True",
             r"__import__\("]


def _code_lines(path: Path) -> list[tuple[int, str]]:
    """Source lines with comments and docstrings removed (tokenize, not a guess)."""
    import io
    import tokenize
    keep: dict[int, list[str]] = {}
    tokens = tokenize.generate_tokens(io.StringIO(path.read_text(encoding="utf-8")).readline)
    previous = None
    for tok in tokens:
        if tok.type == tokenize.COMMENT:
            continue
        if tok.type == tokenize.STRING and previous in (None, tokenize.NEWLINE, tokenize.INDENT,
                                                        tokenize.DEDENT, tokenize.NL):
            previous = tok.type
            continue  # a docstring or bare string statement
        if tok.type not in (tokenize.NL, tokenize.NEWLINE, tokenize.INDENT, tokenize.DEDENT):
            keep.setdefault(tok.start[0], []).append(tok.string)
        previous = tok.type
    return [(number, " ".join(parts)) for number, parts in sorted(keep.items())]


def test_package_uses_only_safe_loaders() -> None:
    hits = []
    for path in sorted((REPO_ROOT / "gate").rglob("*.py")):
        for number, line in _code_lines(path):
            compact = line.replace(" ", "")
            for pattern in FORBIDDEN:
                if re.search(pattern, line) or re.search(pattern, compact):
                    hits.append(f"{path.relative_to(REPO_ROOT)}:{number}: {pattern}: {line}")
    assert not hits, "\n".join(hits)


def test_safe_loader_grep_can_fail(tmp_path) -> None:
    """The scanner above finds a planted call (so its silence means something)."""
    planted = tmp_path / "planted.py"
    planted.write_text('"""doc mentions eval( and pickle"""\n# yaml.load( in a comment\n'
                       "x = yaml.load(stream)\n", encoding="utf-8")
    lines = _code_lines(planted)
    assert [n for n, text in lines if re.search(r"yaml\.load\(", text.replace(" ", ""))] == [3]
    assert not any("pickle" in text or "eval" in text for _, text in lines)


# --- git names (roofgate check) ----------------------------------------------------------------

CHECK_POLICY = "version: 1\nname: t\nrules:\n  - {id: fits, kind: fits_in_buffer, check: params}\n"


def _fc(out_features: int) -> onnx.ModelProto:
    return model([helper.make_node("Gemm", ["x", "w"], ["y"], name="fc", transB=1)],
                 [vi("x", [1, 1024])], [vi("y", [1, out_features])],
                 [weight("w", [out_features, 1024])])


@pytest.fixture()
def repo(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Repo:
    repo = Repo(tmp_path / "repo")
    repo.write("roofgate.yaml", f"targets: [{TARGET}]\npolicies: [gate.yaml]\n")
    repo.write("gate.yaml", CHECK_POLICY)
    save(_fc(64), repo.path / "keep.onnx")
    repo.commit("base")
    repo.branch("pr")
    monkeypatch.chdir(repo.path)
    return repo


HOSTILE_FILES = ["-rf.onnx", "--output=x.onnx", "a b/c d.onnx", "q'\"`$(touch pwned)`.onnx",
                 "ünï/模型 ☃.onnx", "new\nline.onnx", "tab\there.onnx", "semi;colon&.onnx",
                 os.fsdecode(b"latin1-caf\xe9.onnx"), os.fsdecode(b"not-utf8-\xff\xfe.onnx")]


def test_check_handles_hostile_file_names_without_a_shell(repo, monkeypatch) -> None:
    calls: list[tuple[Any, dict[str, Any]]] = []
    real_popen = subprocess.Popen.__init__

    def spy(self: Any, args: Any, *rest: Any, **kwargs: Any) -> None:
        calls.append((args, kwargs))
        real_popen(self, args, *rest, **kwargs)

    for index, name in enumerate(HOSTILE_FILES):
        (repo.path / name).parent.mkdir(parents=True, exist_ok=True)
        save(_fc(4096 if index % 2 else 32), repo.path / name)  # odd ones: 16 MiB, fail
    repo.commit("hostile names")
    monkeypatch.setattr(subprocess.Popen, "__init__", spy)
    result = invoke(["check", "--base", "main"])
    monkeypatch.undo()
    assert result.exit_code == 1, (result.stdout, result.stderr)
    assert_no_traceback(result)
    assert calls and all(isinstance(a, (list, tuple)) and not kw.get("shell") for a, kw in calls)
    assert not (repo.path / "pwned").exists() and not (repo.path / "x.onnx").exists()
    data = json.loads((repo.path / "roofgate-out/result.json").read_text(encoding="utf-8"))
    models = {e["model"] for e in data["result"]["entries"]}
    assert models == set(HOSTILE_FILES), models
    failed = {e["model"] for e in data["result"]["entries"] if e["status"] == "fail"}
    assert failed == set(HOSTILE_FILES[1::2])


def test_check_refuses_a_base_ref_that_looks_like_an_option(repo) -> None:
    for ref in ("--output=/tmp/x", "-p", "main;touch pwned"):
        result = invoke(["check", "--base", ref])
        assert result.exit_code == 2, (ref, result.stdout, result.stderr)
        assert_no_traceback(result)
        assert ref in result.stderr
    assert not (repo.path / "pwned").exists()


# --- hostile names in the profile command ---------------------------------------------------------

@pytest.mark.parametrize("fmt", ["table", "json", "csv"])
def test_profile_output_keeps_hostile_names_inert(hostile_run, tmp_path, fmt) -> None:
    nodes = [helper.make_node("MatMul", ["x", "w"], ["y"], name=NAME),
             helper.make_node("Relu", ["y"], ["z"], name=SECOND)]
    proto = model(nodes, [vi("x", [1, 64])], [vi("z", None)], [weight("w", [64, 64])])
    path = save(proto, tmp_path / "h.onnx")
    result = invoke(["profile", str(path), "--target", TARGET, "--format", fmt])
    assert result.exit_code == 0, result.stderr
    assert_no_traceback(result)
    if fmt == "json":
        text = json.dumps(json.loads(result.stdout))
        assert json.dumps(NAME) in text and json.dumps(SECOND) in text  # exact round trip
    elif fmt == "csv":
        import csv
        import io
        rows = list(csv.reader(io.StringIO(result.stdout, newline="")))
        assert len(rows) == 3 and {len(row) for row in rows} == {len(rows[0])}  # no row split
        assert "\x1b" not in result.stdout  # no terminal escape through `cat`
    else:
        assert not re.search(r"[\x00-\x08\x0b-\x1f\x7f-\x9f]", result.stdout)
        assert not any(line.startswith("::error") for line in result.stdout.splitlines())


def test_profile_table_has_no_unicode_line_separators(tmp_path) -> None:
    proto = model([helper.make_node("Relu", ["x"], ["y"], name="a\u2028b\u2029c")],
                  [vi("x", [1, 4])], [vi("y", [1, 4])])
    result = invoke(["profile", str(save(proto, tmp_path / "h.onnx"))])
    assert result.exit_code == 0
    assert not re.search("[\u2028\u2029]", result.stdout)


_DEBUG_COST_FUNCTION = """
import sys
import gate.ops.registry as registry
def crash(node):
    raise ZeroDivisionError("simulated bug")
registry._REGISTRY[("", "Conv")] = crash
from gate.cli import main
sys.argv = ["roofgate", *sys.argv[1:]]
main()
"""


def test_debug_crash_still_exits_3(tmp_path) -> None:
    path = save(small_cnn(), tmp_path / "m.onnx")
    done = subprocess.run([sys.executable, "-c", _DEBUG_SCRIPT, "--debug", "evaluate", str(path),
                           "-t", TARGET, "-p", DEFAULT_POLICY], capture_output=True, text=True,
                          timeout=60, shell=False, check=False, cwd=tmp_path)
    assert "Traceback" in done.stderr and done.returncode == 3


def test_debug_shows_the_traceback_of_a_cost_function_bug(tmp_path) -> None:
    path = save(small_cnn(), tmp_path / "m.onnx")
    done = subprocess.run([sys.executable, "-c", _DEBUG_COST_FUNCTION, "--debug", "profile",
                           str(path)], capture_output=True, text=True, timeout=60, shell=False,
                          check=False, cwd=tmp_path)
    assert done.returncode == 3 and "Traceback" in done.stderr, done.stderr


# --- nothing a model says may act on the user's terminal ----------------------------------------

TTY_NAME = "evil\x1b[2J\x1b]0;pwned\x07\x9b31m"


def _on_a_terminal(args: list[str], cwd: Path) -> tuple[int, bytes]:
    """Run roofgate with stdout and stderr on a pseudo-terminal (click strips ANSI codes only
    when the stream is not a terminal, so CliRunner cannot see this)."""
    import pty
    master, slave = pty.openpty()
    proc = subprocess.Popen([sys.executable, "-c", "from gate.cli import main; main()", *args],
                            stdout=slave, stderr=slave, stdin=subprocess.DEVNULL, cwd=cwd,
                            shell=False)
    os.close(slave)
    chunks = []
    while True:
        try:
            data = os.read(master, 65536)
        except OSError:  # EIO once the child has closed the terminal
            break
        if not data:
            break
        chunks.append(data)
    proc.wait(timeout=60)
    os.close(master)
    return proc.returncode, b"".join(chunks)


@pytest.mark.skipif(not hasattr(os, "openpty"), reason="needs a pseudo-terminal")
def test_error_line_with_hostile_name_is_inert_on_a_terminal(tmp_path) -> None:
    nodes = [helper.make_node("Relu", ["b"], ["a"], name=TTY_NAME),
             helper.make_node("Add", ["a", "x"], ["b"], name="r2")]
    path = tmp_path / "cyclic.onnx"
    path.write_bytes(model(nodes, [vi("x", [1, 4])], [vi("b", [1, 4])]).SerializeToString())
    for args in (["profile", str(path)],
                 ["evaluate", str(path), "-t", TARGET, "-p", DEFAULT_POLICY]):
        code, output = _on_a_terminal(args, tmp_path)
        assert code == 2, output
        assert b"\x1b" not in output and b"\x07" not in output and b"\xc2\x9b" not in output
        assert b"evil\\x1b[2J" in output  # shown visibly instead


@pytest.mark.skipif(not hasattr(os, "openpty"), reason="needs a pseudo-terminal")
def test_profile_warnings_are_inert_on_a_terminal(tmp_path) -> None:
    tensor = TensorProto(name="w" + TTY_NAME, data_type=TensorProto.FLOAT, dims=[4, 4],
                         data_location=TensorProto.EXTERNAL)
    tensor.external_data.add(key="location", value="../" + TTY_NAME)
    proto = model([helper.make_node("MatMul", ["x", "w" + TTY_NAME], ["y"], name="mm")],
                  [vi("x", [1, 4])], [vi("y", [1, 4])], [tensor])
    path = tmp_path / "m.onnx"
    path.write_bytes(proto.SerializeToString())
    code, output = _on_a_terminal(["profile", str(path)], tmp_path)
    assert code == 0, output
    assert b"\x1b" not in output and b"\x07" not in output, output


# --- check: unanalysable files from git, determinism -----------------------------------------

def _check_twice(repo: Repo, tmp_path: Path) -> tuple[Path, Path, int]:
    import shutil
    outs = []
    code = -1
    for run in ("one", "two"):
        result = invoke(["check", "--base", "main"])
        assert_no_traceback(result)
        code = result.exit_code
        outs.append(Path(shutil.copytree(repo.path / "roofgate-out", tmp_path / run)))
    return outs[0], outs[1], code


def test_check_fails_closed_and_is_deterministic(repo, tmp_path) -> None:
    save(_fc(4096), repo.path / "big.onnx")
    (repo.path / "broken.onnx").write_bytes(b"\x08\x07junk")
    repo.write("lfs.onnx", LFS_POINTER)
    repo.commit("mixed")
    first, second, code = _check_twice(repo, tmp_path)
    assert code == 2
    for name in sorted(os.listdir(first)):
        assert (first / name).read_bytes() == (second / name).read_bytes(), name
    data = _strict_json((first / "result.json").read_text(encoding="utf-8"))
    assert data["exit_code"] == 2
    assert {e["model"] for e in data["result"]["errors"]} == {"broken.onnx", "lfs.onnx"}
    assert "git lfs pull" in json.dumps(data["result"]["errors"])


def test_check_names_an_unanalysable_model_once_per_line(repo, tmp_path) -> None:
    (repo.path / "broken.onnx").write_bytes(b"\x08\x07junk")
    repo.commit("broken")
    first, _, code = _check_twice(repo, tmp_path)
    assert code == 2
    markdown = (first / "summary.md").read_text(encoding="utf-8")
    assert "broken.onnx: broken.onnx" not in markdown


def test_hostile_policy_strings_are_escaped_too(tmp_path) -> None:
    """A pull request can edit the policy file: its remedy, description and waiver reason
    reach the PR comment, JUnit and annotations, so they are escaped like node names."""
    text = json.dumps("<img src=x onerror=alert(3)>|`</details>\n::error::forged @all")
    soon = date.today() + timedelta(days=30)  # waivers must expire within 90 days
    policy = tmp_path / "p.yaml"
    policy.write_text(f"""version: 1
name: {text}
description: {text}
rules:
  - {{id: fits, kind: fits_in_buffer, check: params, remedy: {text}, description: {text}}}
  - {{id: util, kind: min_utilization, min: 90%, severity: warning, remedy: {text}}}
waivers:
  - {{rule: util, models: ["**"], reason: {text}, expires: {soon}}}
""", encoding="utf-8")
    path = save(model([helper.make_node("MatMul", ["x", "w"], ["y"], name="mm")],
                      [vi("x", [1, 2048])], [vi("y", None)], [weight("w", [2048, 2048])]),
                tmp_path / "m.onnx")
    result = gate(path, tmp_path / "out", policy=str(policy))
    assert result.exit_code == 1, result.stderr
    markdown = (tmp_path / "out" / FILES["markdown"]).read_text(encoding="utf-8")
    assert "onerror" in markdown and "<img" not in markdown and "@all" not in markdown
    folds = [ln for ln in markdown.splitlines() if "details>" in ln]  # the one passing fold
    assert folds in ([], ["<details>", "</details>"])
    _assert_table_rows_keep_their_columns(markdown)
    assert "<img" not in (tmp_path / "out" / FILES["html"]).read_text(encoding="utf-8")
    ET.parse(tmp_path / "out" / FILES["junit"])
    assert all(line.startswith("::") for line in result.stdout.splitlines())
