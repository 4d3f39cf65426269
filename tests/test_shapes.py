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

from pathlib import Path

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper
from onnx.reference import ReferenceEvaluator

from gate.errors import InputError
from gate.model.loader import load_model
from gate.model.shape_values import VALUE_LIMIT, propagate_values
from gate.model.shapes import parse_shape, parse_shape_binding
from gate.profile import profile_model
from loadkit import model, save, vi

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
