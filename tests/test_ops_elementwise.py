"""Elementwise cost functions: per-element constants and ONNX broadcasting.

External checks: every op is built as a one-node model and shape-inferred by
``onnx.shape_inference`` in strict mode (the op and its dtypes are valid per the
ONNX spec); broadcast output sizes agree with ``numpy.broadcast_shapes``.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from onnx import TensorProto

from gate.ops import Unmodelled, cost_function_for
from gate.ops.elementwise import BINARY_OPS, GELU_OPS_PER_ELEMENT, UNARY_OPS_PER_ELEMENT
from tests.opkit import inferred_node, node

SHAPE = (2, 3, 4)
INPUT_DTYPE = {"Not": TensorProto.BOOL, "And": TensorProto.BOOL, "Or": TensorProto.BOOL,
               "Xor": TensorProto.BOOL, "BitwiseNot": TensorProto.INT32,
               "BitwiseAnd": TensorProto.INT32, "BitwiseOr": TensorProto.INT32,
               "BitwiseXor": TensorProto.INT32, "BitShift": TensorProto.UINT32,
               "Mod": TensorProto.INT32}
EXTRA_ATTRS = {"BitShift": {"direction": "LEFT"}}
OPSET_FOR = {"Swish": 24, "Mish": 22}


def _infer(op: str, shapes, attrs=None):
    dtype = INPUT_DTYPE.get(op, TensorProto.FLOAT)
    return inferred_node(op, shapes, attrs or EXTRA_ATTRS.get(op),
                         dtypes={i: dtype for i in range(len(shapes))}, opset=OPSET_FOR.get(op, 21))


@pytest.mark.parametrize("op", sorted(UNARY_OPS_PER_ELEMENT))
def test_unary_ops_cost_their_constant_per_element(op):
    work = cost_function_for("", op)(_infer(op, [SHAPE]))
    assert work.vector_ops == UNARY_OPS_PER_ELEMENT[op] * 24
    assert work.flops == work.vector_ops and work.macs == 0 and work.gemms == ()
    assert not work.is_view


@pytest.mark.parametrize("op", sorted(BINARY_OPS))
def test_binary_ops_count_broadcast_outputs(op):
    n = _infer(op, [(2, 1, 4), (3, 1)])
    assert n.outputs[0].shape == (2, 3, 4)
    work = cost_function_for("", op)(n)
    assert work.flops == work.vector_ops == 24


@settings(max_examples=30, deadline=None)
@given(st.lists(st.integers(1, 4), min_size=0, max_size=4), st.data())
def test_broadcast_fallback_matches_numpy(shape, data):
    other = [d if data.draw(st.booleans()) else 1 for d in shape][data.draw(st.integers(0, len(shape))):]
    expected = int(np.prod(np.broadcast_shapes(tuple(shape), tuple(other))))
    bare = node("Mul", [tuple(shape), tuple(other)], [None])  # no inferred output: broadcast inputs
    assert cost_function_for("", "Mul")(bare).flops == expected


def test_prelu_where_and_variadic():
    assert cost_function_for("", "PRelu")(_infer("PRelu", [SHAPE, (4,)])).flops == 48
    where = inferred_node("Where", [(2, 3, 1), (1, 4), SHAPE], dtypes={0: TensorProto.BOOL})
    assert cost_function_for("", "Where")(where).flops == 24
    summed = _infer("Sum", [SHAPE, SHAPE, (4,)])
    assert cost_function_for("", "Sum")(summed).flops == 2 * 24
    assert cost_function_for("", "Mean")(_infer("Mean", [SHAPE, SHAPE])).flops == 2 * 24
    single = cost_function_for("", "Max")(_infer("Max", [SHAPE]))
    assert (single.flops, single.vector_ops) == (0, 24)  # a copy


@pytest.mark.parametrize("approximate", sorted(GELU_OPS_PER_ELEMENT))
def test_gelu_modes(approximate):
    n = inferred_node("Gelu", [SHAPE], {"approximate": approximate}, opset=20)
    assert cost_function_for("", "Gelu")(n).flops == GELU_OPS_PER_ELEMENT[approximate] * 24


def test_symbolic_or_unknown_shapes_are_unmodelled():
    with pytest.raises(Unmodelled, match="--dim seq=N"):
        cost_function_for("", "Relu")(node("Relu", [(1, "seq")], [(1, "seq")]))
    with pytest.raises(Unmodelled, match="unknown"):
        from tests.opkit import ti
        cost_function_for("", "Relu")(node("Relu", [ti("x", None)], [None]))


def test_dim_left_unknown_by_shape_inference_is_not_called_symbolic():
    from gate.model.convert import UNKNOWN_DIM
    with pytest.raises(Unmodelled, match="left unknown") as info:
        cost_function_for("", "Relu")(node("Relu", [(1, UNKNOWN_DIM)], [None]))
    assert "--dim" not in info.value.reason
