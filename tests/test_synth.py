"""Tests of gate.synth: the graphs are valid ONNX, weights modes behave, the graphs run.

Outside references: ``onnx.checker`` and strict ``onnx.shape_inference`` judge
validity; ``onnx.reference.ReferenceEvaluator`` runs graphs; a numpy
re-implementation of scaled dot-product attention (Vaswani et al. 2017, eq. 1)
checks the transformer computes what it claims. Published MAC and parameter
counts are checked through the real pipeline in tests/test_published_counts.py.
"""

from __future__ import annotations

from collections.abc import Callable
from math import prod, sqrt
from pathlib import Path

import numpy as np
import onnx
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from onnx import TensorProto, numpy_helper
from onnx.reference import ReferenceEvaluator

from gate.model.loader import load_model
from gate.profile import profile_model
from gate.synth import NetBuilder, archs, external_locations, save_model, validate_model
from gate.synth.scenario import (
    DETECTOR_PATH,
    NOTES_PATH,
    SPECIES_PATH,
    WAKEWORD_PATH,
    scenario_models,
    species,
    write_scenario,
)

MiB = 1024 * 1024

SMALL_BUILDS: dict[str, Callable[..., onnx.ModelProto]] = {
    "resnet18": lambda **kw: archs.resnet(18, **kw),
    "resnet50": lambda **kw: archs.resnet(50, **kw),
    "resnet50_3x3": lambda **kw: archs.resnet(50, downsample="3x3", **kw),
    "mobilenet_v1_0.5_160": lambda **kw: archs.mobilenet_v1(0.5, 160, **kw),
    "mobilenet_v2": lambda **kw: archs.mobilenet_v2(**kw),
    "vgg16": lambda **kw: archs.vgg(16, **kw),
    "lstm": lambda **kw: archs.lstm_keyword(**kw),
    "gru_bidirectional": lambda **kw: archs.gru_keyword(bidirectional=True, **kw),
    "transformer": lambda **kw: archs.transformer_encoder(input_size=80, **kw),
}


def _check_externally(model: onnx.ModelProto, folder: Path) -> None:
    """Judge the model with onnx's own checker and strict inference, not our validate_model."""
    for location in external_locations(model):
        (folder / location).touch()  # the checker wants the file to exist; it stays empty
    onnx.checker.check_model(str(save_model(model, folder / "m.onnx")), full_check=True)
    onnx.shape_inference.infer_shapes(model, strict_mode=True, check_type=True)


@pytest.mark.parametrize("name", sorted(SMALL_BUILDS))
def test_reference_architectures_are_valid_onnx(name: str, tmp_path: Path) -> None:
    model = SMALL_BUILDS[name](validate=False)
    _check_externally(model, tmp_path)
    assert model.opset_import[0].version == 17
    names = [node.name for node in model.graph.node]
    assert all(names) and len(names) == len(set(names))


@pytest.mark.parametrize("variant", ["base", "pr"])
def test_scenario_models_are_valid_and_at_the_documented_paths(variant: str,
                                                               tmp_path: Path) -> None:
    models = scenario_models(variant)
    assert set(models) == {SPECIES_PATH, DETECTOR_PATH, WAKEWORD_PATH, NOTES_PATH}
    for path, model in models.items():
        folder = tmp_path / Path(path).stem
        folder.mkdir()
        _check_externally(model, folder)


def test_write_scenario_writes_only_the_model_files(tmp_path: Path) -> None:
    written = write_scenario(tmp_path, "pr")
    found = sorted(p.relative_to(tmp_path).as_posix() for p in tmp_path.rglob("*") if p.is_file())
    assert found == sorted([SPECIES_PATH, DETECTOR_PATH, WAKEWORD_PATH, NOTES_PATH])
    assert sorted(written) == sorted(tmp_path / p for p in found)
    assert all(p.stat().st_size < 100_000 for p in written)


def test_builds_are_deterministic() -> None:
    first, second = scenario_models("pr"), scenario_models("pr")
    for path in first:
        assert first[path].SerializeToString() == second[path].SerializeToString()


def test_external_weights_are_references_to_a_file_never_written(tmp_path: Path) -> None:
    model = archs.resnet50()
    assert model.ByteSize() < 200_000  # 25 M parameters, yet only references
    offset = 0
    for tensor in model.graph.initializer:
        if tensor.data_type != TensorProto.FLOAT:
            continue
        entries = {e.key: e.value for e in tensor.external_data}
        assert tensor.data_location == TensorProto.EXTERNAL and not tensor.raw_data
        assert entries == {"location": "resnet50.weights.bin", "offset": str(offset),
                           "length": str(4 * prod(tensor.dims))}
        offset += 4 * prod(tensor.dims)
    path = save_model(model, tmp_path / "nested" / "resnet50.onnx")
    assert sorted(p.name for p in path.parent.iterdir()) == ["resnet50.onnx"]
    assert len(onnx.load(str(path), load_external_data=False).graph.node) == len(
        model.graph.node)
    with pytest.raises(onnx.checker.ValidationError, match="not regular file"):  # absent
        onnx.load(str(path))


def test_inline_weights_are_real_zero_bytes() -> None:
    model = archs.mobilenet_v1(0.25, 128, weights="inline")
    assert not external_locations(model)
    floats = [t for t in model.graph.initializer if t.data_type == TensorProto.FLOAT]
    for tensor in floats:
        values = numpy_helper.to_array(tensor)
        assert values.shape == tuple(tensor.dims) and not values.any()
    assert model.ByteSize() > 4 * sum(prod(t.dims) for t in floats)


def test_small_constants_stay_inline_in_external_mode() -> None:
    model = archs.transformer_encoder()
    shapes = [t for t in model.graph.initializer if t.data_type == TensorProto.INT64]
    assert shapes and all(t.data_location == TensorProto.DEFAULT for t in shapes)
    assert all(numpy_helper.to_array(t).size <= 4 for t in shapes)


def test_unknown_weights_mode_and_low_opset_are_refused() -> None:
    with pytest.raises(ValueError, match="weights must be one of"):
        archs.resnet18(weights="lazy")
    with pytest.raises(Exception, match="LayerNormalization"):
        archs.transformer_encoder(opset=16)


def test_symbolic_dims_survive_into_the_graph() -> None:
    model = archs.transformer_encoder()
    dims = [d.dim_param or d.dim_value for d in model.graph.input[0].type.tensor_type.shape.dim]
    assert dims == ["batch", "seq", 128]
    out = model.graph.output[0].type.tensor_type.shape.dim
    assert [d.dim_param or d.dim_value for d in out] == ["batch", "seq", 128]


def _nodes(model: onnx.ModelProto) -> dict[str, onnx.NodeProto]:
    return {node.name: node for node in model.graph.node}


def _ints(node: onnx.NodeProto, attr: str) -> list[int]:
    return next(list(a.ints) for a in node.attribute if a.name == attr)


def test_bn_is_a_separate_node_unless_folded() -> None:
    unfused, folded = archs.resnet18(), archs.resnet18(fold_bn=True)
    ops = [n.op_type for n in unfused.graph.node]
    assert ops.count("BatchNormalization") == ops.count("Conv") == 20
    conv_inputs = [len(n.input) for n in unfused.graph.node if n.op_type == "Conv"]
    assert set(conv_inputs) == {2}  # no bias: the BN's shift replaces it
    folded_ops = [n for n in folded.graph.node]
    assert not any(n.op_type == "BatchNormalization" for n in folded_ops)
    assert {len(n.input) for n in folded_ops if n.op_type == "Conv"} == {3}


def test_resnet50_downsample_placement() -> None:
    paper, later = _nodes(archs.resnet50()), _nodes(archs.resnet(50, downsample="3x3"))
    assert _ints(paper["stage2.block1.conv1"], "strides") == [2, 2]
    assert _ints(paper["stage2.block1.conv2"], "strides") == [1, 1]
    assert _ints(later["stage2.block1.conv1"], "strides") == [1, 1]
    assert _ints(later["stage2.block1.conv2"], "strides") == [2, 2]


def test_mobilenet_v1_last_depthwise_layer_has_stride_one() -> None:
    # Howard et al. 2017 Table 1 prints "Conv dw / s2" at 7x7x1024: an erratum (the output
    # would be 4x4 yet the table's pooling is 7x7). We build it with stride 1.
    nodes = _nodes(archs.mobilenet_v1())
    assert _ints(nodes["block13.dw"], "strides") == [1, 1]
    assert _ints(nodes["block12.dw"], "strides") == [2, 2]
    group = next(a.i for a in nodes["block13.dw"].attribute if a.name == "group")
    assert group == 1024


def test_species_pr_widens_exactly_one_layer_past_a_2_to_4_mib_buffer() -> None:
    def layer_param_bytes(model: onnx.ModelProto) -> dict[str, int]:
        sizes = {t.name: 4 * prod(t.dims) for t in model.graph.initializer}
        return {n.name: sum(sizes.get(i, 0) for i in n.input) for n in model.graph.node}

    base, pr = layer_param_bytes(species()), layer_param_bytes(species(last_width=384))
    assert max(base.values()) < 2 * MiB
    over = {name for name, size in pr.items() if size > 2 * MiB}
    assert over == {"stage4.block1.conv2"} and pr["stage4.block1.conv2"] > 4 * MiB


def test_wakeword_pr_prunes_the_hidden_size() -> None:
    def recurrent_hidden(model: onnx.ModelProto) -> set[int]:
        return {a.i for n in model.graph.node for a in n.attribute if a.name == "hidden_size"}

    base = scenario_models("base")[WAKEWORD_PATH]
    pr = scenario_models("pr")[WAKEWORD_PATH]
    assert recurrent_hidden(base) == {256} and recurrent_hidden(pr) == {160}
    assert {n.op_type for n in pr.graph.node} >= {"GRU", "Gemm"}


@settings(max_examples=25, deadline=None)
@given(size=st.integers(4, 24), kernel=st.integers(1, 5), stride=st.integers(1, 3),
       padding=st.integers(0, 2), depthwise=st.booleans())
def test_tracked_conv_shapes_agree_with_onnx_inference(size: int, kernel: int, stride: int,
                                                       padding: int, depthwise: bool) -> None:
    assume(size + 2 * padding >= kernel)
    b = NetBuilder("conv_case")
    x = b.input("x", ["batch", 4, size, size + 1])
    y = b.conv(x, 4 if depthwise else 6, kernel, stride=stride, padding=padding,
               group=4 if depthwise else 1, name="c")
    b.output(b.max_pool(y, 1, 1, name="p"))
    b.build()  # strict inference must agree with the declared (tracked) output shape


def _run(model: onnx.ModelProto, feed: dict[str, np.ndarray]) -> np.ndarray:
    return ReferenceEvaluator(model).run(None, feed)[0]


def test_reference_evaluator_runs_a_small_residual_cnn() -> None:
    model = species(resolution=32, num_species=5, weights="random")
    image = np.random.default_rng(1).standard_normal((1, 3, 32, 32)).astype(np.float32)
    logits = _run(model, {"image": image})
    assert logits.shape == (1, 5) and np.isfinite(logits).all() and logits.any()


@pytest.mark.parametrize("cell", ["lstm", "gru"])
def test_reference_evaluator_runs_recurrent_models_at_any_length(cell: str) -> None:
    model = archs.recurrent_classifier(cell, hidden_size=8, input_size=4, num_classes=3,
                                       bidirectional=cell == "lstm", weights="random")
    for frames in (1, 6):
        x = np.random.default_rng(frames).standard_normal((frames, 2, 4)).astype(np.float32)
        logits = _run(model, {"frames": x})
        assert logits.shape == (2, 3) and np.isfinite(logits).all()


def _layer_norm(x: np.ndarray, scale: np.ndarray, bias: np.ndarray) -> np.ndarray:
    mean = x.mean(-1, keepdims=True)
    return (x - mean) / np.sqrt(x.var(-1, keepdims=True) + 1e-5) * scale + bias


def _numpy_encoder(w: dict[str, np.ndarray], x: np.ndarray, heads: int) -> np.ndarray:
    """One post-norm encoder layer written directly from Vaswani et al. 2017, sec. 3.2-3.3."""
    def lin(t: np.ndarray, name: str) -> np.ndarray:
        return t @ w[f"{name}.weight"] + w[f"{name}.bias"]

    h = lin(x, "embed")
    batch, seq, d_model = h.shape
    size = d_model // heads

    def heads_of(t: np.ndarray) -> np.ndarray:
        return t.reshape(batch, seq, heads, size).transpose(0, 2, 1, 3)

    q, k, v = (heads_of(lin(h, f"enc1.attn.{r}")) for r in "qkv")
    scores = q @ k.transpose(0, 1, 3, 2) / sqrt(size)
    probs = np.exp(scores - scores.max(-1, keepdims=True))
    probs /= probs.sum(-1, keepdims=True)
    context = (probs @ v).transpose(0, 2, 1, 3).reshape(batch, seq, d_model)
    a = _layer_norm(h + lin(context, "enc1.attn.out"), w["enc1.norm1.scale"],
                    w["enc1.norm1.bias"])
    f = lin(np.maximum(lin(a, "enc1.ffn.up"), 0), "enc1.ffn.down")
    return _layer_norm(a + f, w["enc1.norm2.scale"], w["enc1.norm2.bias"])


def test_transformer_graph_computes_multi_head_attention() -> None:
    model = archs.transformer_encoder(layers=1, d_model=8, heads=2, ffn_size=16, input_size=4,
                                      weights="random")
    weights = {t.name: numpy_helper.to_array(t) for t in model.graph.initializer}
    for seq in (3, 7):  # the symbolic seq dim takes any length at run time
        x = np.random.default_rng(seq).standard_normal((2, seq, 4)).astype(np.float32)
        got = _run(model, {"features": x})
        np.testing.assert_allclose(got, _numpy_encoder(weights, x, heads=2), rtol=1e-4,
                                   atol=1e-5)


def test_validate_model_rejects_a_wrong_declared_shape() -> None:
    b = NetBuilder("bad")
    x = b.input("x", [1, 3, 8, 8])
    y = b.conv(x, 4, 3, stride=2, name="c")
    b.output(y)
    model = b.build(validate=False)
    model.graph.output[0].type.tensor_type.shape.dim[2].dim_value = 5  # inference says 4
    with pytest.raises(Exception, match="differ"):
        validate_model(model)


@pytest.mark.parametrize("variant", ["base", "pr"])
def test_scenario_models_profile_fully_through_the_pipeline(variant: str,
                                                            tmp_path: Path) -> None:
    profiles = {}
    for path in write_scenario(tmp_path, variant):
        loaded = load_model(path, dims={"seq": 256})
        profile = profile_model(loaded)
        assert profile.coverage.nodes_modelled == profile.coverage.nodes_total, path
        profiles[path.relative_to(tmp_path).as_posix()] = profile
    biggest = max(profiles[SPECIES_PATH].layers, key=lambda layer: layer.param_bytes)
    # The numbers the scenario module documents (fp32: 4 bytes a parameter, 9 per 3x3 tap).
    width = 384 if variant == "pr" else 192
    assert biggest.name == "stage4.block1.conv2"
    assert biggest.param_bytes == 4 * 9 * width * width
