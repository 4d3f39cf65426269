"""Benchmark inputs, all generated in code (nothing downloaded): graphs, zoos, git repositories."""

from __future__ import annotations

import os
import subprocess
from collections.abc import Callable
from pathlib import Path

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

TARGET = "ws-64x64-4mib"
GIT_ENV = {
    "GIT_AUTHOR_NAME": "Bench", "GIT_AUTHOR_EMAIL": "bench@example.invalid",
    "GIT_COMMITTER_NAME": "Bench", "GIT_COMMITTER_EMAIL": "bench@example.invalid",
    "GIT_CONFIG_NOSYSTEM": "1", "GIT_TERMINAL_PROMPT": "0",
}


# --- graphs ------------------------------------------------------------------

def chain_model(nodes: int, changed_node: int | None = None,
                inserted_at: int | None = None) -> onnx.ModelProto:
    """A chain of small Conv / Relu / Add layers, ``nodes`` long, named by position.

    ``changed_node`` (a Relu's index) becomes a Sigmoid: the one-node change a pull request
    makes. ``inserted_at`` adds one Sigmoid there instead, so every later node is renumbered
    (an exporter's renumbering, the hard case for the layer matcher).
    """
    weight = numpy_helper.from_array(np.zeros((8, 8, 1, 1), np.float32), "w")
    kinds = [("Conv", "Relu", "Add")[i % 3] for i in range(nodes)]
    if changed_node is not None:
        kinds[changed_node] = "Sigmoid"
    if inserted_at is not None:
        kinds.insert(inserted_at, "Sigmoid")
    graph_nodes, x = [], "x"
    for i, kind in enumerate(kinds):
        inputs = {"Conv": [x, "w"], "Add": [x, x]}.get(kind, [x])
        graph_nodes.append(helper.make_node(kind, inputs, [f"t{i}"], name=f"n{i}"))
        x = f"t{i}"
    shape = [1, 8, 8, 8]
    graph = helper.make_graph(
        graph_nodes, "chain", [helper.make_tensor_value_info("x", TensorProto.FLOAT, shape)],
        [helper.make_tensor_value_info(x, TensorProto.FLOAT, shape)], [weight])
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])


def middle_relu(nodes: int) -> int:
    """The index of the Relu nearest the middle of a ``chain_model(nodes)``."""
    middle = nodes // 2
    return middle - middle % 3 + 1


def folding_chain(nodes: int) -> onnx.ModelProto:
    """``nodes`` nodes in threes: a Transpose of a stored weight (folded), a Conv reading
    it, a Relu; every Conv reads the one stored weight (shared)."""
    weight = numpy_helper.from_array(np.zeros((8, 8, 1, 1), np.float32), "w")
    graph_nodes, x = [], "x"
    for i in range(0, nodes, 3):
        graph_nodes += [
            helper.make_node("Transpose", ["w"], [f"w{i}"], perm=[1, 0, 2, 3], name=f"t{i}"),
            helper.make_node("Conv", [x, f"w{i}"], [f"c{i}"], name=f"conv{i}"),
            helper.make_node("Relu", [f"c{i}"], [f"r{i}"], name=f"relu{i}")]
        x = f"r{i}"
    shape = [1, 8, 8, 8]
    graph = helper.make_graph(
        graph_nodes, "folding_chain",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, shape)],
        [helper.make_tensor_value_info(x, TensorProto.FLOAT, shape)], [weight])
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])


def mlp_with_external_data(folder: Path, width: int, data_name: str = "weights.bin") -> Path:
    """Four MatMul layers of width x width fp32 weights in a sparse external data file."""
    folder.mkdir(parents=True, exist_ok=True)
    layer_bytes = width * width * 4
    nodes, inits = [], []
    x = "x"
    for i in range(4):
        tensor = TensorProto(name=f"w{i}", data_type=TensorProto.FLOAT, dims=[width, width])
        tensor.data_location = TensorProto.EXTERNAL
        for key, value in (("location", data_name), ("offset", str(i * layer_bytes)),
                           ("length", str(layer_bytes))):
            entry = tensor.external_data.add()
            entry.key, entry.value = key, value
        inits.append(tensor)
        nodes.append(helper.make_node("MatMul", [x, f"w{i}"], [f"h{i}"], name=f"fc{i}"))
        x = f"h{i}"
    graph = helper.make_graph(
        nodes, "mlp", [helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, width])],
        [helper.make_tensor_value_info(x, TensorProto.FLOAT, [1, width])], inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    path = folder / "mlp.onnx"
    onnx.save(model, str(path))
    with open(folder / data_name, "wb") as data:
        data.truncate(4 * layer_bytes)  # sparse: no disk blocks are written
    return path


# --- zoos ----------------------------------------------------------------------

def zoo_templates(quick: bool = False) -> list[onnx.ModelProto]:
    """Small edge models of several families (0.2 to 1.9 MB of fp32 weights, 0.65 MB on
    average)."""
    from gate.synth.archs import mobilenet_v1, recurrent_classifier, transformer_encoder

    fixed = {"batch": 1, "weights": "inline"}
    templates: list[Callable[[], onnx.ModelProto]] = [
        lambda: mobilenet_v1(width=0.25, resolution=96, **fixed),  # type: ignore[arg-type]
        lambda: recurrent_classifier("lstm", hidden_size=64, seq=50, **fixed),  # type: ignore[arg-type]
        lambda: recurrent_classifier("gru", hidden_size=128, seq=50, **fixed),  # type: ignore[arg-type]
        lambda: transformer_encoder(d_model=64, heads=4, ffn_size=256, seq=32,  # type: ignore[arg-type]
                                    **fixed),
        lambda: recurrent_classifier("gru", hidden_size=64, seq=50, **fixed),  # type: ignore[arg-type]
        lambda: recurrent_classifier("lstm", hidden_size=128, seq=50, **fixed),  # type: ignore[arg-type]
    ]
    return [make() for make in templates[: 2 if quick else len(templates)]]


def with_fresh_weights(template: onnx.ModelProto, seed: int) -> bytes:
    """The template serialized with every fp32 weight drawn anew (like a trained model's:
    incompressible, so git and the loader see realistic bytes)."""
    rng = np.random.default_rng(seed)
    model = onnx.ModelProto()
    model.CopyFrom(template)
    for tensor in model.graph.initializer:
        if tensor.data_type == TensorProto.FLOAT and len(tensor.raw_data) >= 64:
            count = len(tensor.raw_data) // 4
            tensor.raw_data = (rng.standard_normal(count, np.float32) * 0.05).tobytes()
    return model.SerializeToString()


def zoo_path(index: int) -> str:
    """Where model ``index`` lives, repository-relative (100 models per folder)."""
    return f"models/g{index // 100:02d}/m{index:04d}.onnx"


def write_zoo(root: Path, count: int, templates: list[onnx.ModelProto], side: int) -> int:
    """Write ``count`` models under ``root``; ``side`` seeds the weights (0 base, 1 head).
    Returns the total bytes written."""
    total = 0
    for index in range(count):
        path = root / zoo_path(index)
        path.parent.mkdir(parents=True, exist_ok=True)
        data = with_fresh_weights(templates[index % len(templates)], 2 * index + side)
        path.write_bytes(data)
        total += len(data)
    return total


# --- git -------------------------------------------------------------------------

def git(repo: Path, *args: str) -> str:
    """Run git in ``repo`` with a fixed identity and no user or system configuration."""
    env = {**os.environ, **GIT_ENV, "HOME": str(repo)}
    done = subprocess.run(
        ["git", "-c", "commit.gpgsign=false", "-c", "core.hooksPath=/dev/null", *args],
        cwd=repo, env=env, capture_output=True, check=True)
    return done.stdout.decode("utf-8", "replace")


def new_repo(repo: Path, config: str) -> None:
    """An empty repository on branch main holding ``roofgate.yaml``."""
    repo.mkdir(parents=True, exist_ok=True)
    git(repo, "init", "-q", "-b", "main")
    (repo / "roofgate.yaml").write_text(config, encoding="utf-8")


def commit_all(repo: Path, message: str) -> None:
    git(repo, "add", "-A", "--", ".")
    git(repo, "commit", "-q", "-m", message)


def project_config(reports: Path, *, html: bool) -> str:
    """A roofgate.yaml as a CI job would have it: one target, the default policy, reports."""
    lines = ["version: 1", f"targets: [{TARGET}]", "policies: [default]", "reports:",
             f"  junit: {reports / 'junit.xml'}", f"  markdown: {reports / 'summary.md'}",
             f"  json: {reports / 'result.json'}"]
    if html:
        lines.append(f"  html: {reports / 'report.html'}")
    return "\n".join(lines) + "\n"
