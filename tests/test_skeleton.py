"""Weight values left out while reading (gate/model/skeleton.py), checked against protobuf.

The reference: the same file parsed whole by protobuf (``onnx.load``) with the
values cleared afterwards by ``drop_weight_values``; the lean bytes must parse to
exactly that message, and anything that is not well-formed must fall back (None).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import onnx
import pytest
from loadkit import model, save, small_cnn, vi, weight
from onnx import TensorProto, helper, numpy_helper

import gate.model.loader as loader_module
from gate.model.convert import drop_weight_values
from gate.model.loader import load_model
from gate.model.skeleton import file_without_weights, without_weights


def _weighty() -> onnx.ModelProto:
    """Big and small float weights, values in raw_data, int32_data and float_data, an int64
    tensor small enough to be a shape, and an external tensor (never opened)."""
    proto = small_cnn()
    big = numpy_helper.from_array(np.arange(4096, dtype=np.float32).reshape(64, 64), "big")
    shape = numpy_helper.from_array(np.arange(300, dtype=np.int64), "long_shape")  # kept
    ints = helper.make_tensor("int_data", TensorProto.INT32, [200], list(range(200)))
    floats = helper.make_tensor("float_data", TensorProto.FLOAT, [300], [0.5] * 300)
    external = TensorProto(name="outside", data_type=TensorProto.FLOAT, dims=[100, 100])
    external.data_location = TensorProto.EXTERNAL
    external.external_data.add(key="location", value="weights.bin")
    proto.graph.initializer.extend([big, shape, ints, floats, external])
    return proto


def _reference(proto: onnx.ModelProto) -> onnx.ModelProto:
    copy = onnx.ModelProto()
    copy.CopyFrom(proto)
    drop_weight_values(copy.graph)
    return copy


def test_lean_bytes_parse_to_the_model_with_values_dropped() -> None:
    proto = _weighty()
    data = proto.SerializeToString()
    lean = without_weights(data)
    assert lean is not None and len(lean) < len(data) // 4
    assert onnx.load_model_from_string(lean) == _reference(proto)


def test_a_file_is_read_the_same_way(tmp_path: Path) -> None:
    proto = _weighty()
    path = save(proto, tmp_path / "m.onnx")
    lean = file_without_weights(str(path))
    assert lean is not None and onnx.load_model_from_string(lean) == _reference(proto)


def test_nothing_to_leave_out_or_not_well_formed_falls_back() -> None:
    small = model([helper.make_node("Relu", ["x"], ["y"])], [vi("x", [1, 4])], [vi("y", [1, 4])],
                  [weight("w", [4])])
    assert without_weights(small.SerializeToString()) is None  # small weights are kept
    data = _weighty().SerializeToString()
    for broken in (data[: len(data) // 2], data[:-3], b"\xff" * 64, b"\x0b\x00", b""):
        assert without_weights(broken) is None


def test_loading_lean_or_whole_gives_the_same_model(tmp_path: Path,
                                                    monkeypatch: pytest.MonkeyPatch) -> None:
    path = save(_weighty(), tmp_path / "m.onnx")
    lean = load_model(path)
    monkeypatch.setattr(loader_module, "file_without_weights", lambda _: None)
    whole = load_model(path)
    assert lean == whole
