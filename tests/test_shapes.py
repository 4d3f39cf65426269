"""Whole-input shape bindings and shape values computed at run time.

External checks:
- ``onnx.reference.ReferenceEvaluator`` runs each rebuilt model on small random
  inputs; every tensor shape the loader derives must equal the array shape seen
  during execution, and the MACs of every Conv, MatMul and LSTM are recounted from
  those real arrays (MACs = output elements x reduction length, common practice, no
  source; LSTM: the ONNX operator specification's equations, seq x batch x 4 x
  hidden x (input + hidden)).
- Every shape-arithmetic rule is checked against ``onnx.reference`` running the same
  one-node model (the ONNX operator specification's executable reference).
"""

from __future__ import annotations

import json
import tempfile
from pathlib import Path

import numpy as np
import onnx
import pytest
from click.testing import CliRunner
from gitkit import Repo
from hypothesis import given, settings
from hypothesis import strategies as st
from loadkit import model, save, vi
from onnx import TensorProto, helper, numpy_helper
from onnx.reference import ReferenceEvaluator

from gate.cli import cli
from gate.config import Overrides, load_config
from gate.errors import ConfigError, InputError
from gate.model.loader import load_model
from gate.model.shape_text import parse_shape, parse_shape_binding
from gate.model.shape_values import propagate_values
from gate.profile import profile_model

I64 = TensorProto.INT64


def _int(name: str, values: object) -> TensorProto:
    return numpy_helper.from_array(np.array(values, np.int64), name)


def _weights(rng: np.random.Generator, shapes: dict[str, list[int]]) -> list[TensorProto]:
    return [numpy_helper.from_array((rng.standard_normal(s) * 0.1).astype(np.float32), n)
            for n, s in shapes.items()]


# ------------------------------------------------------------------ rebuilt export patterns

def vad_front_end(length: int | str | None = -1, frame: int = 64, hop: int = 16,
                  bins: int = 17, hidden: int = 8) -> onnx.ModelProto:
    """A speech-activity front end as exporters write it: an STFT as a strided Conv1d whose
    reflect padding is computed at run time from the input length (Shape, Gather, Mod,
    Sub, Cast through float, ConstantOfShape, Concat), magnitude, a Conv encoder, an
    LSTM (weights as plain initializers) and a MatMul + Sigmoid decoder."""
    n = helper.make_node
    nodes = [
        n("Shape", ["audio"], ["shp"], name="shape"),
        n("Gather", ["shp", "one_s"], ["len"], axis=0, name="length"),
        n("Mod", ["len", "hop"], ["rem"], name="rem"),
        n("Sub", ["hop", "rem"], ["short"], name="short"),
        n("Mod", ["short", "hop"], ["fill"], name="fill"),
        n("Add", ["fill", "half"], ["right"], name="right"),
        n("Cast", ["right"], ["right_f"], to=TensorProto.FLOAT, name="right_f"),
        n("Cast", ["right_f"], ["right_i"], to=I64, name="right_i"),
        n("Unsqueeze", ["right_i", "zero"], ["right1"], name="right1"),
        n("ConstantOfShape", ["two"], ["zeros2"], name="zeros",
          value=helper.make_tensor("v", I64, [1], [0])),
        n("Concat", ["zeros2", "half1", "zeros2", "right1"], ["pads"], axis=0, name="pads"),
        n("Unsqueeze", ["audio", "one"], ["x3"], name="x3"),
        n("Pad", ["x3", "pads"], ["padded"], mode="reflect", name="pad"),
        n("Conv", ["padded", "basis"], ["spec"], strides=[hop], name="stft"),
        n("Slice", ["spec", "s0", "s1", "one"], ["re"], name="re"),
        n("Slice", ["spec", "s1", "s2", "one"], ["im"], name="im"),
        n("Mul", ["re", "re"], ["re2"], name="re2"),
        n("Mul", ["im", "im"], ["im2"], name="im2"),
        n("Add", ["re2", "im2"], ["pw"], name="power"),
        n("Sqrt", ["pw"], ["mag"], name="magnitude"),
        n("Conv", ["mag", "enc_w", "enc_b"], ["enc"], pads=[1, 1], name="encoder"),
        n("Relu", ["enc"], ["encr"], name="encoder_relu"),
        n("Transpose", ["encr"], ["seq"], perm=[2, 0, 1], name="to_sequence"),
        n("LSTM", ["seq", "W", "R", "B"], ["Y", "Yh"], hidden_size=hidden, name="lstm"),
        n("Squeeze", ["Yh", "zero"], ["h"], name="last_state"),
        n("MatMul", ["h", "dec_w"], ["logit"], name="decoder"),
        n("Sigmoid", ["logit"], ["prob"], name="speech_prob"),
    ]
    inits = [_int("one", [1]), _int("one_s", 1), _int("zero", [0]), _int("hop", hop),
             _int("half", frame // 2), _int("half1", [frame // 2]), _int("two", [2]),
             _int("s0", [0]), _int("s1", [bins]), _int("s2", [2 * bins])]
    inits += _weights(np.random.default_rng(0), {
        "basis": [2 * bins, 1, frame], "enc_w": [16, bins, 3], "enc_b": [16],
        "W": [1, 4 * hidden, 16], "R": [1, 4 * hidden, hidden], "B": [1, 8 * hidden],
        "dec_w": [hidden, 1]})
    return model(nodes, [vi("audio", [1, length])], [vi("prob", None)], inits, name="vad")


def text_recogniser(width: int | str | None = None, divide: bool = True) -> onnx.ModelProto:
    """A text-line recogniser: two Conv+Relu+MaxPool stages, then a Reshape to a sequence
    whose target shape is computed from the image: [1, Shape(img)[3] / 4, -1] (``divide``)
    or Concat(Slice(Shape(t), 0, 2), [-1]); then a MatMul head over the sequence."""
    n = helper.make_node
    nodes = [
        n("Conv", ["img", "w1", "b1"], ["c1"], pads=[1, 1, 1, 1], name="conv1"),
        n("Relu", ["c1"], ["r1"], name="relu1"),
        n("MaxPool", ["r1"], ["p1"], kernel_shape=[2, 2], strides=[2, 2], name="pool1"),
        n("Conv", ["p1", "w2", "b2"], ["c2"], pads=[1, 1, 1, 1], name="conv2"),
        n("Relu", ["c2"], ["r2"], name="relu2"),
        n("MaxPool", ["r2"], ["p2"], kernel_shape=[2, 2], strides=[2, 2], name="pool2"),
        n("Transpose", ["p2"], ["t"], perm=[0, 3, 1, 2], name="to_sequence"),
    ]
    if divide:
        nodes += [n("Shape", ["img"], ["ishape"], name="image_shape"),
                  n("Gather", ["ishape", "three"], ["iw"], axis=0, name="image_width"),
                  n("Div", ["iw", "four"], ["steps"], name="steps"),
                  n("Unsqueeze", ["steps", "zero"], ["steps1"], name="steps1"),
                  n("Concat", ["one", "steps1", "minus1"], ["newshape"], axis=0, name="target")]
    else:
        nodes += [n("Shape", ["t"], ["tshape"], name="seq_shape"),
                  n("Slice", ["tshape", "zero", "two"], ["head"], name="head"),
                  n("Concat", ["head", "minus1"], ["newshape"], axis=0, name="target")]
    nodes += [n("Reshape", ["t", "newshape"], ["feat"], name="flatten"),
              n("MatMul", ["feat", "w3"], ["h1"], name="project"),
              n("Relu", ["h1"], ["h1r"], name="project_relu"),
              n("MatMul", ["h1r", "w4"], ["logits"], name="classes"),
              n("Softmax", ["logits"], ["probs"], axis=-1, name="softmax")]
    inits = [_int("zero", [0]), _int("two", [2]), _int("one", [1]), _int("minus1", [-1]),
             _int("three", 3), _int("four", 4)]
    inits += _weights(np.random.default_rng(1), {
        "w1": [8, 1, 3, 3], "b1": [8], "w2": [16, 8, 3, 3], "b2": [16], "w3": [128, 32],
        "w4": [32, 37]})
    return model(nodes, [vi("img", [1, 1, 32, width])], [vi("probs", None)], inits,
                 name="text_recogniser")


# ------------------------------------------------------------------ execution traces

def _trace(proto: onnx.ModelProto, feeds: dict[str, np.ndarray]) -> dict[str, tuple[int, ...]]:
    """The real array shape of every tensor while onnx.reference runs the model."""
    traced = onnx.ModelProto()
    traced.CopyFrom(proto)
    names = [o for node in traced.graph.node for o in node.output if o]
    declared = {o.name for o in traced.graph.output}
    traced.graph.output.extend(onnx.ValueInfoProto(name=o) for o in names if o not in declared)
    results = ReferenceEvaluator(traced).run(None, feeds)
    shapes = {o.name: tuple(np.asarray(r).shape) for o, r in zip(traced.graph.output, results)}
    shapes.update({name: tuple(array.shape) for name, array in feeds.items()})
    shapes.update({t.name: tuple(t.dims) for t in proto.graph.initializer})
    return shapes


def _traced_macs(node: onnx.NodeProto, shape: dict[str, tuple[int, ...]]) -> int:
    """MACs of one layer from the arrays seen during execution."""
    if node.op_type == "Conv":  # every output element reduces over C_in/group x kernel
        return int(np.prod(shape[node.output[0]]) * np.prod(shape[node.input[1]][1:]))
    if node.op_type == "MatMul":  # every output element reduces over the shared K
        return int(np.prod(shape[node.output[0]]) * shape[node.input[0]][-1])
    if node.op_type == "LSTM":  # ONNX spec: per step and gate, Xt*W^T + Ht-1*R^T
        seq, batch, size = shape[node.input[0]]
        dirs, gates_hidden, hidden = shape[node.input[2]]
        return seq * batch * dirs * gates_hidden * (size + hidden)
    return 0


def _check_against_trace(path: Path, proto: onnx.ModelProto, feeds: dict[str, np.ndarray],
                         shapes: dict[str, tuple[int, ...]]) -> int:
    loaded = load_model(path, shapes=shapes)
    real = _trace(proto, feeds)
    profile = profile_model(loaded)
    assert profile.coverage.nodes_modelled == profile.coverage.nodes_total
    by_name = {layer.name: layer for layer in profile.layers}
    for node in proto.graph.node:
        layer = by_name[node.name]
        assert layer.output_shapes == tuple(real[o] for o in node.output), node.name
        assert layer.macs == _traced_macs(node, real), node.name
    expected = sum(_traced_macs(node, real) for node in proto.graph.node)
    assert expected > 0 and profile.total_macs == expected
    return expected


def vad_with_deployed_weights(hidden: int = 8) -> onnx.ModelProto:
    """``vad_front_end`` as exporters also write it: LSTM W and R behind Unsqueeze of 2-D
    initializers, and the decoder under an If on a sample-rate constant (Equal of an
    initializer and a Constant node): a MatMul at 16 kHz, a two-layer head otherwise."""
    proto = vad_front_end(hidden=hidden)
    graph = proto.graph
    n = helper.make_node
    for name in ("W", "R"):
        stored = next(t for t in graph.initializer if t.name == name)
        stored.name, stored.dims[:] = f"{name}_2d", list(stored.dims)[1:]
        graph.node.insert(0, n("Unsqueeze", [f"{name}_2d", "zero"], [name], name=f"{name}_3d"))
    decoder = [node for node in graph.node if node.name in ("decoder", "speech_prob")]
    for node in decoder:
        graph.node.remove(node)
    then_branch = helper.make_graph(decoder, "at_16k", [], [vi("prob", None)])
    else_branch = helper.make_graph(
        [n("MatMul", ["h", "dec8k_1"], ["d1"], name="dec8k_1"),
         n("Relu", ["d1"], ["d1r"], name="dec8k_relu"),
         n("MatMul", ["d1r", "dec8k_2"], ["d2"], name="dec8k_2"),
         n("Sigmoid", ["d2"], ["prob8k"], name="dec8k_prob")], "at_8k", [], [vi("prob8k", None)])
    graph.node.extend([
        n("Constant", [], ["sr16k"], value=helper.make_tensor("v", I64, [], [16000]),
          name="sr16k"),
        n("Equal", ["sample_rate", "sr16k"], ["is16k"], name="is16k"),
        n("If", ["is16k"], ["prob"], then_branch=then_branch, else_branch=else_branch,
          name="decoder_by_rate")])
    graph.initializer.extend([_int("sample_rate", 16000), *_weights(
        np.random.default_rng(12), {"dec8k_1": [hidden, 64], "dec8k_2": [64, 1]})])
    return proto


def test_vad_with_unsqueezed_weights_and_a_decoder_under_if(tmp_path: Path) -> None:
    # The If's condition folds (16 kHz): only the MatMul of the taken branch counts, as in
    # the execution trace, where onnx.reference runs that branch alone.
    hidden = 8
    proto = vad_with_deployed_weights(hidden)
    path = save(proto, tmp_path / "vad_if.onnx")
    audio = np.random.default_rng(13).standard_normal((1, 1000)).astype(np.float32)
    loaded = load_model(path, shapes={"audio": (1, 1000)})
    profile = profile_model(loaded)
    real = _trace(proto, {"audio": audio})
    assert profile.coverage.nodes_modelled == profile.coverage.nodes_total
    decoder = next(layer for layer in profile.layers if layer.name == "decoder_by_rate")
    assert decoder.macs == int(np.prod(real["prob"])) * hidden  # the 16 kHz MatMul only
    expected = sum(_traced_macs(node, real) for node in proto.graph.node) + decoder.macs
    lstm = next(layer for layer in profile.layers if layer.name == "lstm")
    assert lstm.macs == _traced_macs(next(n for n in proto.graph.node if n.name == "lstm"), real)
    assert lstm.param_bytes > 0  # its weights behind Unsqueeze are still its parameters
    assert profile.total_macs == expected


@pytest.mark.parametrize("length_dim", [-1, None, "samples"])
@pytest.mark.parametrize("samples", [1000, 1024, 333])
def test_vad_front_end_macs_equal_the_execution_trace(tmp_path: Path, length_dim: object,
                                                       samples: int) -> None:
    proto = vad_front_end(length_dim)  # -1, unnamed or named: --shape binds each
    path = save(proto, tmp_path / "vad.onnx")
    audio = np.random.default_rng(2).standard_normal((1, samples)).astype(np.float32)
    _check_against_trace(path, proto, {"audio": audio}, {"audio": (1, samples)})


def test_vad_front_end_was_unsized_before_binding_and_says_how(tmp_path: Path) -> None:
    path = save(vad_front_end(-1), tmp_path / "vad.onnx")
    profile = profile_model(load_model(path))
    assert profile.total_macs == 0 and profile.coverage.nodes_modelled < 27
    hints = [n for n in profile.notes if "--shape audio=1xN" in n]
    assert len(hints) == 1 and "input 'audio'" in hints[0]  # once, naming input and flag


def test_vad_front_end_with_fixed_length_needs_no_flag(tmp_path: Path) -> None:
    # onnx shape inference alone loses the padded length (Mod, ConstantOfShape); the shape
    # values evaluated by the loader recover it.
    proto = vad_front_end(1000)
    inferred = onnx.shape_inference.infer_shapes(proto, data_prop=True)
    padded = next(v for v in inferred.graph.value_info if v.name == "padded")
    assert not padded.type.tensor_type.shape.dim[2].HasField("dim_value")
    path = save(proto, tmp_path / "vad.onnx")
    audio = np.zeros((1, 1000), np.float32)
    _check_against_trace(path, proto, {"audio": audio}, {})


@pytest.mark.parametrize("divide", [True, False])
@pytest.mark.parametrize("width", [64, 100, 128])
def test_text_recogniser_macs_equal_the_execution_trace(tmp_path: Path, divide: bool,
                                                         width: int) -> None:
    proto = text_recogniser(None, divide)
    path = save(proto, tmp_path / "ocr.onnx")
    image = np.random.default_rng(3).standard_normal((1, 1, 32, width)).astype(np.float32)
    _check_against_trace(path, proto, {"img": image}, {"img": (1, 1, 32, width)})


def test_text_recogniser_computed_reshape_was_low_before(tmp_path: Path) -> None:
    # onnx shape inference with data propagation loses the Reshape built with Div.
    proto = text_recogniser(64, divide=True)
    inferred = onnx.shape_inference.infer_shapes(proto, data_prop=True)
    feat = next(v for v in inferred.graph.value_info if v.name == "feat")
    assert not all(d.HasField("dim_value") for d in feat.type.tensor_type.shape.dim)
    loaded = load_model(save(proto, tmp_path / "ocr.onnx"))
    assert profile_model(loaded).coverage.nodes_modelled == len(proto.graph.node)


# ------------------------------------------------------------------ each rule against onnx.reference

def _rule_case(op: str, inputs: list[np.ndarray | None], **attrs: object):
    """A one-node model whose inputs are stored constants; output value from both sides."""
    names = [f"in{i}" if value is not None else "" for i, value in enumerate(inputs)]
    inits = [numpy_helper.from_array(value, name)
             for name, value in zip(names, inputs) if value is not None]
    node = helper.make_node(op, names, ["out"], **attrs)
    proto = model([node], [], [vi("out", None)], inits, opset=18)
    expected = ReferenceEvaluator(proto).run(None, {})[0]
    return propagate_values(proto).get("out"), np.asarray(expected)


def _a(values: object, dtype: type = np.int64) -> np.ndarray:
    return np.array(values, dtype)


RULE_CASES = {
    "Div truncates toward zero": ("Div", [_a([7, -7, 7, -7, 0]), _a([2, 2, -2, -2, 3])], {}),
    "Mod sign of divisor": ("Mod", [_a([7, -7, 7, -7]), _a([3, 3, -3, -3])], {}),
    "Mod fmod": ("Mod", [_a([7, -7, 7, -7]), _a([3, 3, -3, -3])], {"fmod": 1}),
    "Add broadcast": ("Add", [_a([[1], [2]]), _a([10, 20, 30])], {}),
    "Sub": ("Sub", [_a(5), _a([1, 2, 9])], {}),
    "Mul": ("Mul", [_a([3, 4]), _a(-2)], {}),
    "Max": ("Max", [_a([1, 9, 3]), _a([4, 2, 8]), _a(5)], {}),
    "Min": ("Min", [_a([1, 9, 3]), _a([4, 2, 8])], {}),
    "Neg": ("Neg", [_a([1, -2])], {}),
    "Abs": ("Abs", [_a([1, -2])], {}),
    "Gather negative index": ("Gather", [_a([5, 6, 7, 8]), _a([-1, 0])], {"axis": 0}),
    "Gather scalar index": ("Gather", [_a([5, 6, 7, 8]), _a(2)], {}),
    "Slice clamped": ("Slice", [_a([1, 2, 3, 4, 5]), _a([1]), _a([2**62])], {}),
    "Slice negative step": ("Slice", [_a([1, 2, 3, 4, 5]), _a([-1]), _a([-2**62]), _a([0]),
                                      _a([-2])], {}),
    "Slice 2-D axis 1": ("Slice", [_a([[1, 2, 3], [4, 5, 6]]), _a([-2]), _a([3]), _a([1])], {}),
    "Concat": ("Concat", [_a([1, 2]), _a([3]), _a([-1])], {"axis": 0}),
    "Unsqueeze": ("Unsqueeze", [_a(4), _a([0])], {}),
    "Unsqueeze negative": ("Unsqueeze", [_a([4, 5]), _a([-1])], {}),
    "Squeeze": ("Squeeze", [_a([[4]]), _a([0, 1])], {}),
    "Squeeze all": ("Squeeze", [_a([[4, 5]])], {}),
    "Cast int to float": ("Cast", [_a([3, -7])], {"to": TensorProto.FLOAT}),
    "Cast float to int truncates": ("Cast", [_a(-2.75, np.float32)], {"to": TensorProto.INT64}),
    "Cast to int32": ("Cast", [_a([3, 70000])], {"to": TensorProto.INT32}),
    "Floor": ("Floor", [_a(-2.5, np.float32)], {}),
    "Ceil": ("Ceil", [_a(2.25, np.float32)], {}),
    "Round half to even": ("Round", [_a(2.5, np.float32)], {}),
    "Div float": ("Div", [_a(7.0, np.float32), _a(2.0, np.float32)], {}),
    "ConstantOfShape int": ("ConstantOfShape", [_a([2, 3])],
                            {"value": helper.make_tensor("v", TensorProto.INT64, [1], [7])}),
    "ConstantOfShape default": ("ConstantOfShape", [_a([3])], {}),
    "Range": ("Range", [_a(2), _a(11), _a(3)], {}),
    "Range down": ("Range", [_a(10), _a(1), _a(-4)], {}),
    "Range empty": ("Range", [_a(5), _a(1), _a(1)], {}),
    "Reshape 0 and -1": ("Reshape", [_a([[1, 2, 3], [4, 5, 6]]), _a([0, -1])], {}),
    "Reshape flat": ("Reshape", [_a([[1, 2], [3, 4]]), _a([-1])], {}),
    "Expand": ("Expand", [_a([1, 2]), _a([3, 1])], {}),
    "Where": ("Where", [_a([True, False, True], bool), _a([1, 2, 3]), _a([-1, -2, -3])], {}),
    "Equal": ("Equal", [_a([1, 2, 3]), _a([1, 0, 3])], {}),
    "Less": ("Less", [_a([1, 2, 3]), _a(2)], {}),
    "Greater": ("Greater", [_a([1, 2, 3]), _a(2)], {}),
    "Not": ("Not", [_a([True, False], bool)], {}),
    "And": ("And", [_a([True, True], bool), _a([True, False], bool)], {}),
    "ReduceProd": ("ReduceProd", [_a([2, 3, 4]), _a([0])], {"keepdims": 0}),
    "ReduceSum keepdims": ("ReduceSum", [_a([[1, 2], [3, 4]]), _a([1])], {}),
    "ReduceMax all": ("ReduceMax", [_a([[1, 7], [3, 4]])], {"keepdims": 0}),
    "Identity": ("Identity", [_a([1, 2])], {}),
    "Sign": ("Sign", [_a([3, -2, 0])], {}),
    "Xor": ("Xor", [_a([True, True], bool), _a([True, False], bool)], {}),
    "Flatten": ("Flatten", [_a([[[1, 2], [3, 4]]])], {"axis": 2}),
    "Tile": ("Tile", [_a([[1, 2]]), _a([2, 3])], {}),
}


@pytest.mark.parametrize("case", sorted(RULE_CASES))
def test_rule_matches_the_onnx_reference(case: str) -> None:
    # Source: onnx.reference (the ONNX operator specification's executable reference).
    op, inputs, attrs = RULE_CASES[case]
    got, expected = _rule_case(op, inputs, **attrs)
    assert got is not None, case
    assert got.dtype == expected.dtype and got.shape == expected.shape, case
    assert np.array_equal(got, expected), (case, got, expected)


@settings(max_examples=60, deadline=None)
@given(st.sampled_from(["Add", "Sub", "Mul", "Div", "Mod", "Mod fmod", "Max", "Min"]),
       st.lists(st.integers(-2**31, 2**31), min_size=1, max_size=4),
       st.lists(st.integers(-2**31, 2**31).filter(bool), min_size=1, max_size=4))
def test_integer_arithmetic_matches_the_onnx_reference(op: str, left: list[int],
                                                       right: list[int]) -> None:
    # Source: onnx.reference on random int64 operands (nonzero divisors, no overflow).
    size = min(len(left), len(right))
    name, attrs = (op.split()[0], {"fmod": 1}) if op.endswith("fmod") else (op, {})
    got, expected = _rule_case(name, [_a(left[:size]), _a(right[:size])], **attrs)
    assert got is not None and np.array_equal(got, expected), (op, got, expected)


def test_shape_rule_reads_only_shapes() -> None:
    # Source: onnx.reference runs Shape/Size (with start and end) on a real array.
    nodes = [helper.make_node("Shape", ["x"], ["s"], start=1, end=-1),
             helper.make_node("Size", ["x"], ["n"])]
    proto = model(nodes, [vi("x", [2, 3, 4, 5])], [vi("s", None), vi("n", None)])
    s, n = ReferenceEvaluator(proto).run(None, {"x": np.zeros((2, 3, 4, 5), np.float32)})
    values = propagate_values(proto)
    assert np.array_equal(values["s"], s) and np.array_equal(values["n"], n)


@pytest.mark.parametrize("op, inputs, attrs", [
    ("Mul", [_a([2**40]), _a([2**40])], {}),  # beyond int64: not wrapped around, just unknown
    ("Div", [_a([4]), _a([0])], {}),  # division by zero
    ("Mod", [_a([4]), _a([0])], {}),
    ("Mod", [_a([4]), _a([0])], {"fmod": 1}),
    ("ConstantOfShape", [_a([10**6])], {}),  # too large to hold: never materialised
    ("Range", [_a(0), _a(10**9), _a(1)], {}),
    ("Cast", [_a(2**40)], {"to": TensorProto.INT32}),  # does not fit int32
    ("Cast", [_a(7e4, np.float32)], {"to": TensorProto.FLOAT16}),  # beyond float16
    ("Cast", [_a(np.inf, np.float32)], {"to": TensorProto.INT64}),
    ("Gather", [_a([1, 2]), _a([5])], {}),  # index out of range
    ("Reshape", [_a([1, 2, 3]), _a([2, -1])], {}),  # inconsistent
    ("Unsqueeze", [_a(1), _a(list(range(70)))], {}),  # beyond numpy's rank limit
])
def test_values_that_cannot_be_known_stay_unknown(op: str, inputs: list[np.ndarray],
                                                  attrs: dict) -> None:
    names = [f"in{i}" for i in range(len(inputs))]
    inits = [numpy_helper.from_array(v, n) for n, v in zip(names, inputs)]
    proto = model([helper.make_node(op, names, ["out"], **attrs)], [], [vi("out", None)], inits)
    assert "out" not in propagate_values(proto)


def test_weights_are_never_read(tmp_path: Path) -> None:
    # A float initializer of more than 8 elements is a weight: its values never enter the
    # evaluation, even when a Shape-like chain could use them.
    weight = numpy_helper.from_array(np.arange(9, dtype=np.float32), "w")
    nodes = [helper.make_node("Cast", ["w"], ["wi"], to=TensorProto.INT64)]
    proto = model(nodes, [], [vi("wi", None)], [weight])
    assert "wi" not in propagate_values(proto)


# ------------------------------------------------------------------ binding whole inputs

def _square_name_cnn() -> onnx.ModelProto:
    """Conv + Relu with H and W both declared as 'size' (input and output alike)."""
    nodes = [helper.make_node("Conv", ["x", "w"], ["c"], pads=[1, 1, 1, 1], name="conv"),
             helper.make_node("Relu", ["c"], ["y"], name="relu")]
    inits = _weights(np.random.default_rng(4), {"w": [8, 3, 3, 3]})
    return model(nodes, [vi("x", ["batch", 3, "size", "size"])],
                 [vi("y", ["batch", 8, "size", "size"])], inits)


def test_shared_dim_name_gets_a_value_per_dim(tmp_path: Path) -> None:
    proto = _square_name_cnn()
    path = save(proto, tmp_path / "square.onnx")
    unbound = load_model(path)
    assert [n for n in unbound.warnings if "dims 2 and 3" in n and "--shape x=" in n]
    image = np.zeros((2, 3, 32, 48), np.float32)  # H != W, as deployed
    macs = _check_against_trace(path, proto, {"x": image}, {"x": (2, 3, 32, 48)})
    assert macs == 2 * 32 * 48 * 8 * 3 * 3 * 3


def test_a_name_bound_once_binds_it_on_other_inputs(tmp_path: Path) -> None:
    nodes = [helper.make_node("Add", ["ids", "mask"], ["s"], name="add"),
             helper.make_node("MatMul", ["s", "w"], ["y"], name="proj")]
    proto = model(nodes, [vi("ids", ["batch", "seq"]), vi("mask", ["batch", "seq"])],
                  [vi("y", ["batch", 4])], _weights(np.random.default_rng(5), {"w": [7, 4]}))
    path = save(proto, tmp_path / "two.onnx")
    feeds = {"ids": np.zeros((2, 7), np.float32), "mask": np.zeros((2, 7), np.float32)}
    _check_against_trace(path, proto, feeds, {"ids": (2, 7)})


def test_shape_and_dim_together(tmp_path: Path) -> None:
    proto = _square_name_cnn()
    path = save(proto, tmp_path / "square.onnx")
    loaded = load_model(path, {"batch": 1}, {"x": (1, 3, 16, 16)})
    assert loaded.unbound_dims == () and loaded.shape_bindings == {"x": (1, 3, 16, 16)}
    assert loaded.dim_bindings == {"batch": 1}


@pytest.mark.parametrize("shapes, dims, message", [
    ({"images": (1, 3, 8, 8)}, {}, "the model has no input 'images' (its inputs: 'x')"),
    ({"w": (8, 3, 3, 3)}, {}, "the model has no input 'w'"),  # an initializer is no input
    ({"x": (1, 3, 8)}, {}, "input 'x' has rank 4 (batch x 3 x size x size); give 4 sizes"),
    ({"x": (1, 4, 8, 8)}, {}, "dim 1 of input 'x' is fixed at 3 in the model; give 3 there"),
    ({"x": (1, 3, 8, 8)}, {"batch": 2}, "dim 0 ('batch') contradicts --dim batch=2"),
    ({"x": (1, 3, 0, 8)}, {}, "not a list of positive int64 sizes"),
])
def test_bindings_that_contradict_the_model_are_refused(tmp_path: Path, shapes: dict,
                                                        dims: dict, message: str) -> None:
    path = save(_square_name_cnn(), tmp_path / "square.onnx")
    with pytest.raises(InputError) as raised:
        load_model(path, dims, shapes)
    text = raised.value.format_message()
    assert message in text and str(path) in text and "\n" not in text


@pytest.mark.parametrize("text, expected", [
    ("images=1x3x640x640", ("images", (1, 3, 640, 640))),
    (" audio = 1 x 16000 ", ("audio", (1, 16000))),
    ("a=b=2X3", ("a=b", (2, 3))),  # the shape follows the last '='
    ("x=9223372036854775807", ("x", (2**63 - 1,))),
])
def test_parse_shape_binding(text: str, expected: tuple) -> None:
    assert parse_shape_binding(text) == expected


@pytest.mark.parametrize("text, message", [
    ("images", "expected INPUT=SHAPE"), ("=1x3", "expected INPUT=SHAPE"),
    ("x=", "not a shape"), ("x=1x", "not a shape"), ("x=1.5x2", "not a shape"),
    ("x=abc", "not a shape"), ("x=1x-1", "size -1 is not positive"),
    ("x=0x3", "size 0 is not positive"), ("x=1x9223372036854775808", "beyond int64"),
    ("x=1x٣", "not a shape"),  # a non-ASCII digit
])
def test_parse_shape_binding_refuses(text: str, message: str) -> None:
    with pytest.raises(ValueError, match=message):
        parse_shape_binding(text)
    assert parse_shape("1x2") == (1, 2)


# ------------------------------------------------------------------ notes on what stays unsized

def test_data_dependent_size_names_the_node_and_says_no_flag_fixes_it(tmp_path: Path) -> None:
    nodes = [helper.make_node("NonZero", ["x"], ["nz"], name="find"),
             helper.make_node("Transpose", ["nz"], ["t"], name="swap"),
             helper.make_node("Cast", ["t"], ["y"], to=TensorProto.FLOAT, name="cast")]
    proto = model(nodes, [vi("x", [4, 5])], [vi("y", None)])
    loaded = load_model(save(proto, tmp_path / "nz.onnx"))
    notes = [w for w in loaded.warnings if "stay unsized" in w]
    assert len(notes) == 1
    assert "node 'find' (NonZero, output 'nz')" in notes[0]
    assert "no --shape or --dim can size them" in notes[0]


def test_sized_models_get_no_sizing_note(tmp_path: Path) -> None:
    loaded = load_model(save(text_recogniser(64), tmp_path / "ocr.onnx"))
    assert not [w for w in loaded.warnings if "--shape" in w or "unsized" in w]


# ------------------------------------------------------------------ the command line and roofgate.yaml

TARGET = "ws-64x64-4mib"
POLICY = "version: 1\nname: t\nrules:\n  - {id: coverage, kind: max_unmodelled, max_work_share: 0}\n"


@pytest.fixture()
def vad_dir(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    save(vad_front_end(-1), tmp_path / "vad.onnx")
    (tmp_path / "policy.yaml").write_text(POLICY, encoding="utf-8")
    monkeypatch.chdir(tmp_path)
    return tmp_path


COMMANDS = {
    "profile": ["profile", "vad.onnx"],
    "evaluate": ["evaluate", "vad.onnx", "-t", TARGET, "-p", "policy.yaml"],
    "baseline": ["baseline", "vad.onnx", "-t", TARGET, "-o", "base.json"],
    "diff": ["diff", "vad.onnx", "vad.onnx", "-t", TARGET],
    "audit": ["audit", "vad.onnx", "-t", TARGET, "-p", "policy.yaml"],
    "check": ["check", "--base", "main", "-t", TARGET],
}


@pytest.mark.parametrize("command", sorted(COMMANDS))
@pytest.mark.parametrize("flag, message", [
    ("audio=1x0", "size 0 is not positive"),
    ("audio=1x-4", "size -4 is not positive"),
    ("audio=lots", "not a shape"),
    ("audio", "expected INPUT=SHAPE"),
    ("audio=1x99999999999999999999", "beyond int64"),
])
def test_bad_shape_text_is_one_line_and_exit_2_on_every_command(vad_dir: Path, command: str,
                                                                  flag: str, message: str) -> None:
    result = CliRunner().invoke(cli, [*COMMANDS[command], "--shape", flag])
    assert result.exit_code == 2, result.output
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and message in lines[0] and "--shape" in lines[0], result.stderr
    assert "Traceback" not in result.output


@pytest.mark.parametrize("flag, message", [
    ("speech=1x1000", "the model has no input 'speech' (its inputs: 'audio')"),
    ("audio=1000", "input 'audio' has rank 2 (1 x -1); give 2 sizes"),
    ("audio=1x2x1000", "input 'audio' has rank 2"),
    ("audio=2x1000", "dim 0 of input 'audio' is fixed at 1"),
])
def test_shape_that_does_not_fit_the_model_is_one_line_and_exit_2(vad_dir: Path, flag: str,
                                                                   message: str) -> None:
    for command in ("profile", "baseline"):
        result = CliRunner().invoke(cli, [*COMMANDS[command], "--shape", flag])
        assert result.exit_code == 2, result.output
        lines = result.stderr.strip().splitlines()
        assert len(lines) == 1 and message in lines[0] and "vad.onnx" in lines[0], lines
    for command in ("evaluate", "audit"):  # the model is named as unanalysable, never passed
        result = CliRunner().invoke(cli, [*COMMANDS[command], "--shape", flag])
        assert result.exit_code == 2 and message in result.output, result.output
        assert "Traceback" not in result.output


def test_shape_bound_twice_differently_is_refused(vad_dir: Path) -> None:
    result = CliRunner().invoke(cli, [*COMMANDS["profile"], "--shape", "audio=1x10",
                                      "--shape", "audio=1x20"])
    assert result.exit_code == 2 and "bound twice (1x10 and 1x20)" in result.stderr


def test_every_analysing_command_binds_the_shape(vad_dir: Path) -> None:
    runner = CliRunner()
    unbound = runner.invoke(cli, COMMANDS["evaluate"])
    assert unbound.exit_code == 1, unbound.output  # 0 MACs: the coverage rule fails it
    for command in ("evaluate", "audit", "diff", "baseline"):
        result = runner.invoke(cli, [*COMMANDS[command], "--shape", "audio=1x1000"])
        assert result.exit_code == 0, (command, result.output)
    runs = json.loads(Path("base.json").read_text(encoding="utf-8"))["runs"]
    assert runs[0]["metrics"]["macs"] == _vad_macs(1000)
    profile = runner.invoke(cli, [*COMMANDS["profile"], "--shape", "audio=1x1000",
                                  "--format", "json"])
    document = json.loads(profile.stdout)
    assert document["totals"]["macs"] == _vad_macs(1000)
    assert document["model"]["shape_bindings"] == {"audio": [1, 1000]}


def _vad_macs(samples: int) -> int:
    """MACs of ``vad_front_end`` from an onnx.reference execution trace."""
    proto = vad_front_end(-1)
    real = _trace(proto, {"audio": np.zeros((1, samples), np.float32)})
    return sum(_traced_macs(node, real) for node in proto.graph.node)


def _write_config(root: Path, text: str) -> Path:
    path = root / "roofgate.yaml"
    path.write_text(text, encoding="utf-8")
    return path


def test_config_shapes_per_group_and_flags_override(tmp_path: Path) -> None:
    path = _write_config(tmp_path, f"targets: [{TARGET}]\nshapes: {{audio: 1x500}}\nmodels:\n"
                         "  - paths: ['speech/*.onnx']\n    shapes: {audio: [1, 1000]}\n"
                         "  - paths: ['**/*.onnx']\n")
    config = load_config(path)
    assert dict(config.groups[0].shapes) == {"audio": (1, 1000)}
    assert dict(config.groups[1].shapes) == {"audio": (1, 500)}
    flags = load_config(path, overrides=Overrides(shapes={"audio": (1, 64), "x": (2,)}))
    assert dict(flags.groups[0].shapes) == {"audio": (1, 64), "x": (2,)}
    assert config.groups[0].key != flags.groups[0].key


def test_config_shape_errors_name_line_and_key(tmp_path: Path) -> None:
    path = _write_config(tmp_path, f"targets: [{TARGET}]\nshapes: {{audio: 1x0}}\nmodels:\n"
                         "  - paths: ['*.onnx']\n    shapes: {audio: 0x3, mel: [1, a], x: {y: 1}}\n")
    with pytest.raises(ConfigError) as raised:
        load_config(path)
    text = "\n".join(raised.value.problems)
    assert "roofgate.yaml:2" in text and "shapes.audio: size 0 is not positive" in text
    assert "models[0].shapes.audio: size 0 is not positive" in text  # 0x3 is not hex here
    assert "models[0].shapes.mel: not a shape" in text and "models[0].shapes.x: not a shape" in text


def test_audit_takes_shapes_from_the_config_and_the_flag_wins(vad_dir: Path) -> None:
    _write_config(vad_dir, f"targets: [{TARGET}]\npolicies: [policy.yaml]\n"
                  "shapes: {audio: 1x1000}\n")
    runner = CliRunner()
    for extra, samples in (([], 1000), (["--shape", "audio=1x2000"], 2000)):
        result = runner.invoke(cli, ["audit", "vad.onnx", "--json", "out.json", *extra])
        assert result.exit_code == 0, result.output
        entry = json.loads(Path("out.json").read_text(encoding="utf-8"))["result"]["entries"][0]
        assert entry["head"]["metrics"]["macs"] == _vad_macs(samples)


# ------------------------------------------------------------------ more export patterns, traced

def upsample_neck(use_scales: bool) -> onnx.ModelProto:
    """A detector neck: Conv, then Resize to twice the size computed from Shape(x), either
    as ``sizes`` (Concat(Slice(Shape), Mul(Slice(Shape), 2))) or as float ``scales`` (Cast,
    Div), concatenated with a skip branch at that size, then a Conv. H and W are unnamed."""
    n = helper.make_node
    nodes = [n("Conv", ["x", "w1"], ["c1"], strides=[2, 2], pads=[1, 1, 1, 1], name="down"),
             n("Shape", ["c1"], ["s"], name="shape"),
             n("Slice", ["s", "zero", "two"], ["nc"], name="batch_channels"),
             n("Slice", ["s", "two", "four"], ["hw"], name="spatial"),
             n("Mul", ["hw", "two"], ["hw2"], name="doubled")]
    if use_scales:
        nodes += [n("Cast", ["hw2"], ["hw2f"], to=TensorProto.FLOAT, name="hw2f"),
                  n("Cast", ["hw"], ["hwf"], to=TensorProto.FLOAT, name="hwf"),
                  n("Div", ["hw2f", "hwf"], ["ratio"], name="ratio"),
                  n("Concat", ["ones_f", "ratio"], ["scales"], axis=0, name="scales"),
                  n("Resize", ["c1", "", "scales"], ["up"], mode="nearest", name="up")]
    else:
        nodes += [n("Concat", ["nc", "hw2"], ["sizes"], axis=0, name="sizes"),
                  n("Resize", ["c1", "", "", "sizes"], ["up"], mode="nearest", name="up")]
    nodes += [n("Concat", ["up", "x"], ["cat"], axis=1, name="merge"),
              n("Conv", ["cat", "w2"], ["y"], pads=[1, 1, 1, 1], name="fuse")]
    inits = [_int("zero", [0]), _int("two", [2]), _int("four", [4]),
             numpy_helper.from_array(np.ones(2, np.float32), "ones_f")]
    inits += _weights(np.random.default_rng(6), {"w1": [8, 4, 3, 3], "w2": [16, 12, 3, 3]})
    return model(nodes, [vi("x", [1, 4, None, None])], [vi("y", None)], inits, opset=18)


@pytest.mark.parametrize("use_scales", [False, True])
def test_upsample_to_a_computed_size_equals_the_execution_trace(tmp_path: Path,
                                                                use_scales: bool) -> None:
    proto = upsample_neck(use_scales)
    path = save(proto, tmp_path / "neck.onnx")
    image = np.random.default_rng(7).standard_normal((1, 4, 24, 40)).astype(np.float32)
    _check_against_trace(path, proto, {"x": image}, {"x": (1, 4, 24, 40)})


def token_embedding(hidden: int = 16) -> onnx.ModelProto:
    """A text encoder's embedding: token ids of a -1 length; positions from
    Range(0, Shape(ids)[1], 1), gathered from a position table and added; a MatMul."""
    n = helper.make_node
    nodes = [n("Gather", ["table", "ids"], ["tok"], name="tokens"),
             n("Shape", ["ids"], ["s"], name="shape"),
             n("Gather", ["s", "one_s"], ["length"], name="length"),
             n("Range", ["zero_s", "length", "one_s"], ["pos"], name="positions"),
             n("Unsqueeze", ["pos", "zero"], ["pos2"], name="positions2"),
             n("Gather", ["pos_table", "pos2"], ["pe"], name="position_embedding"),
             n("Add", ["tok", "pe"], ["emb"], name="embed"),
             n("MatMul", ["emb", "w"], ["y"], name="project")]
    inits = [_int("zero", [0]), _int("zero_s", 0), _int("one_s", 1)]
    inits += _weights(np.random.default_rng(8), {"table": [50, hidden],
                                                  "pos_table": [64, hidden],
                                                  "w": [hidden, 24]})
    return model(nodes, [vi("ids", [1, -1], I64)], [vi("y", None)], inits)


def test_positions_from_range_equal_the_execution_trace(tmp_path: Path) -> None:
    proto = token_embedding()
    path = save(proto, tmp_path / "embed.onnx")
    ids = np.random.default_rng(9).integers(0, 50, (1, 11)).astype(np.int64)
    assert _check_against_trace(path, proto, {"ids": ids}, {"ids": (1, 11)}) == 11 * 16 * 24


def head_split_stack(blocks: int, width: int = 32, heads: int = 4) -> onnx.ModelProto:
    """``blocks`` blocks that split a [1, seq, width] tensor into heads with a Reshape whose
    target uses Div (seq * width / width), a per-head MatMul, and merge back with a Reshape
    computed the same way: each block's Shape reads the previous block's Reshape."""
    n = helper.make_node
    nodes, x = [], "x"
    inits = [_int("one", [1]), _int("one_s", 1), _int("heads", [heads]), _int("minus1", [-1]),
             _int("zero", [0]), _int("width", width), _int("width1", [width])]
    rng = np.random.default_rng(10)
    for i in range(blocks):
        p = f"b{i}_"
        nodes += [n("Shape", [x], [p + "s"], name=p + "shape"),
                  n("Gather", [p + "s", "one_s"], [p + "seq"], name=p + "seq"),
                  n("Mul", [p + "seq", "width"], [p + "area"], name=p + "area"),
                  n("Div", [p + "area", "width"], [p + "seq_again"], name=p + "seq_again"),
                  n("Unsqueeze", [p + "seq_again", "zero"], [p + "seq1"], name=p + "seq1"),
                  n("Concat", ["one", p + "seq1", "heads", "minus1"], [p + "split_to"], axis=0,
                    name=p + "split_to"),
                  n("Reshape", [x, p + "split_to"], [p + "split"], name=p + "split"),
                  n("Transpose", [p + "split"], [p + "heads"], perm=[0, 2, 1, 3],
                    name=p + "to_heads"),
                  n("MatMul", [p + "heads", p + "w"], [p + "mm"], name=p + "per_head"),
                  n("Transpose", [p + "mm"], [p + "back"], perm=[0, 2, 1, 3], name=p + "back"),
                  n("Concat", ["one", p + "seq1", "width1"], [p + "merge_to"], axis=0,
                    name=p + "merge_to"),
                  n("Reshape", [p + "back", p + "merge_to"], [p + "y"], name=p + "merge")]
        inits += _weights(rng, {p + "w": [width // heads, width // heads]})
        x = p + "y"
    return model(nodes, [vi("x", [1, None, width])], [vi(x, None)], inits)


def test_a_stack_of_computed_reshapes_is_sized_in_one_walk(tmp_path: Path) -> None:
    # Twelve blocks, more than the rounds of whole-model inference roofgate allows (8): the
    # per-node inference inside one walk must carry the sizes through all of them.
    proto = head_split_stack(12)
    path = save(proto, tmp_path / "stack.onnx")
    x = np.random.default_rng(11).standard_normal((1, 10, 32)).astype(np.float32)
    assert _check_against_trace(path, proto, {"x": x}, {"x": (1, 10, 32)}) == 12 * 10 * 32 * 8


@settings(max_examples=15, deadline=None)
@given(st.sampled_from([32, 64]), st.sampled_from([8, 16, 32]), st.integers(80, 2000))
def test_vad_front_end_any_length_equals_the_execution_trace(frame: int, hop: int,
                                                             samples: int) -> None:
    # Source: onnx.reference execution traces over random lengths, hops and frame sizes.
    proto = vad_front_end(-1, frame=frame, hop=hop)
    audio = np.random.default_rng(samples).standard_normal((1, samples)).astype(np.float32)
    with tempfile.TemporaryDirectory() as folder:
        path = save(proto, Path(folder) / "vad.onnx")
        _check_against_trace(path, proto, {"audio": audio}, {"audio": (1, samples)})


@settings(max_examples=15, deadline=None)
@given(st.integers(4, 300), st.booleans())
def test_text_recogniser_any_width_equals_the_execution_trace(width: int, divide: bool) -> None:
    # Source: onnx.reference execution traces over random image widths (odd ones included).
    proto = text_recogniser(None, divide)
    image = np.random.default_rng(width).standard_normal((1, 1, 32, width)).astype(np.float32)
    with tempfile.TemporaryDirectory() as folder:
        path = save(proto, Path(folder) / "ocr.onnx")
        _check_against_trace(path, proto, {"img": image}, {"img": (1, 1, 32, width)})


def test_check_binds_both_sides_from_the_config_and_the_flag(tmp_path: Path,
                                                              monkeypatch: pytest.MonkeyPatch,
                                                              ) -> None:
    # Both sides of a pull request are read from git and bound alike: the base side by the
    # same group's shapes, so the diff compares like with like.
    repo = Repo(tmp_path / "repo")
    repo.write("roofgate.yaml", f"targets: [{TARGET}]\npolicies: [policy.yaml]\n"
               "models:\n  - paths: ['speech/*.onnx']\n    shapes: {audio: 1x1000}\n")
    repo.write("policy.yaml", POLICY)
    repo.write("speech/vad.onnx", vad_front_end(-1, hidden=8).SerializeToString())
    repo.commit("base")
    repo.branch("pr")
    repo.write("speech/vad.onnx", vad_front_end(-1, hidden=16).SerializeToString())
    repo.commit("wider LSTM")
    monkeypatch.chdir(repo.path)
    for extra, samples in (([], 1000), (["--shape", "audio=1x2000"], 2000)):
        result = CliRunner().invoke(cli, ["check", "--base", "main", "--json", "out.json", *extra])
        assert result.exit_code == 0, result.output
        entry = json.loads(Path("out.json").read_text(encoding="utf-8"))["result"]["entries"][0]
        base, head = entry["base"]["metrics"]["macs"], entry["head"]["metrics"]["macs"]
        assert base == _vad_macs(samples) and head > base > 0


# ------------------------------------------------------------------ walks on fully sized graphs

def _relu_chain(nodes: int) -> onnx.ModelProto:
    chain = [helper.make_node("Relu", [f"t{i}"], [f"t{i + 1}"]) for i in range(nodes)]
    return onnx.shape_inference.infer_shapes(
        model(chain, [vi("t0", [1, 4])], [vi(f"t{nodes}", [1, 4])]))


def test_unsized_names_reads_each_distinct_type_once(monkeypatch: pytest.MonkeyPatch) -> None:
    from gate.model import shape_values
    asked = []
    real = shape_values._type_is_sized

    def counting(value_type: onnx.TypeProto, declared: frozenset[str]) -> bool:
        asked.append(value_type)
        return real(value_type, declared)

    monkeypatch.setattr(shape_values, "_type_is_sized", counting)
    proto = _relu_chain(20)
    assert shape_values.unsized_names(proto.graph, frozenset()) == set()
    assert len(asked) == 1  # 19 value_infos and 1 output, all float [1, 4]
    # a different type is still read, and an unsized one still named
    proto.graph.value_info[5].type.tensor_type.shape.dim[1].Clear()
    assert shape_values.unsized_names(proto.graph, frozenset()) == {"t6"}
    assert len(asked) == 3


def test_sizing_notes_look_for_no_origin_when_every_output_is_sized(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    from gate.model import shapes

    def refuse(_: object) -> None:
        raise AssertionError("searched for origins although every output is sized")

    loaded = load_model(save(_relu_chain(5), tmp_path / "chain.onnx"))
    monkeypatch.setattr(shapes, "_origins", refuse)
    assert shapes.sizing_notes(loaded.graph) == []
