"""Data-movement, view, Resize and misc cost functions.

External check: every node is a one-node model accepted by strict
``onnx.shape_inference``; element counts come from the shapes onnx infers.
"""

from __future__ import annotations

import numpy as np
import pytest
from onnx import TensorProto

from gate.ops import Unmodelled, cost_function_for
from gate.ops.resize import interpolation_ops
from tests.opkit import inferred_node, node, ti

X = (2, 3, 4, 4)  # 96 elements
I64 = np.int64


def _work(n):
    return cost_function_for(n.domain, n.op_type)(n)


VIEWS = [
    ("Reshape", [X, (2,)], {}, {1: np.array([6, 16], I64)}),
    ("Squeeze", [(1, 3, 4), (1,)], {}, {1: np.array([0], I64)}),
    ("Unsqueeze", [X, (1,)], {}, {1: np.array([0], I64)}),
    ("Flatten", [X], {"axis": 1}, {}),
    ("Identity", [X], {}, {}),
    ("Dropout", [X], {}, {}),
    ("Shape", [X], {}, {}),
    ("Size", [X], {}, {}),
]


@pytest.mark.parametrize("op,inputs,attrs,consts", VIEWS, ids=[v[0] for v in VIEWS])
def test_views_move_nothing(op, inputs, attrs, consts):
    work = _work(inferred_node(op, inputs, attrs, constants=consts))
    assert work.is_view and work.flops == work.vector_ops == work.macs == 0


def test_views_need_no_shapes():
    assert _work(node("Reshape", [ti("x", None), (2,)], [None])).is_view


MOVES = [
    ("Transpose", [X], {"perm": [0, 2, 3, 1]}, {}, 96),
    ("Concat", [X, X], {"axis": 1}, {}, 192),
    ("Split", [X], {"axis": 1, "num_outputs": 3}, {}, 96),
    ("Slice", [X, (1,), (1,)], {}, {1: np.array([1], I64), 2: np.array([3], I64)}, 1 * 3 * 4 * 4),
    ("Gather", [X, (5,)], {"axis": 1}, {1: np.array([0, 1, 2, 0, 1], I64)}, 2 * 5 * 16),
    ("Pad", [X, (8,)], {}, {1: np.array([0, 0, 1, 1, 0, 0, 1, 1], I64)}, 2 * 3 * 6 * 6),
    ("Expand", [(3, 1), (2,)], {}, {1: np.array([3, 5], I64)}, 15),
    ("Tile", [X, (4,)], {}, {1: np.array([1, 2, 1, 1], I64)}, 192),
    ("DepthToSpace", [(1, 8, 2, 2)], {"blocksize": 2}, {}, 32),
    ("SpaceToDepth", [(1, 2, 4, 4)], {"blocksize": 2}, {}, 32),
    ("ConstantOfShape", [(2,)], {}, {1: None}, 12),
]


@pytest.mark.parametrize("op,inputs,attrs,consts,written", MOVES, ids=[m[0] for m in MOVES])
def test_movement_counts_elements_written(op, inputs, attrs, consts, written):
    if op == "ConstantOfShape":
        consts = {0: np.array([3, 4], I64)}
    n_out = 3 if op == "Split" else 1
    work = _work(inferred_node(op, inputs, attrs, constants=consts, n_outputs=n_out))
    assert (work.vector_ops, work.flops, work.macs, work.is_view) == (written, 0, 0, False)


def test_cast_is_movement_and_constant_is_view():
    cast = inferred_node("Cast", [X], {"to": TensorProto.FLOAT16})
    assert (_work(cast).vector_ops, _work(cast).flops) == (96, 0)
    assert _work(node("Constant", [], [(3,)])).is_view


@pytest.mark.parametrize("mode,scales,expected_per_output", [
    ("nearest", [1, 1, 2, 2], 0), ("linear", [1, 1, 2, 2], 9), ("cubic", [1, 1, 2, 2], 35),
    ("linear", [1, 1, 1, 2], 3),
])
def test_resize_interpolates_changed_axes(mode, scales, expected_per_output):
    n = inferred_node("Resize", [X, None, (4,)], {"mode": mode},
                      constants={2: np.array(scales, np.float32)})
    outputs = int(np.prod(n.outputs[0].shape))
    work = _work(n)
    assert interpolation_ops(mode, sum(s != 1 for s in scales)) == expected_per_output
    if expected_per_output:
        assert work.flops == work.vector_ops == expected_per_output * outputs
    else:
        assert (work.flops, work.vector_ops) == (0, outputs)


def test_resize_antialias_and_unknown_output_are_unmodelled():
    with pytest.raises(Unmodelled, match="antialias"):
        _work(node("Resize", [X], [(2, 3, 8, 8)], {"mode": "linear", "antialias": 1}))
    with pytest.raises(Unmodelled, match="unknown"):
        _work(node("Resize", [X], [None], {"mode": "linear"}))


def test_scatter_with_reduction_adds_one_op_per_update():
    consts = {1: np.array([[0], [2]], I64)}
    plain = inferred_node("ScatterND", [(4, 3), (2, 1), (2, 3)], constants=consts)
    assert (_work(plain).vector_ops, _work(plain).flops) == (12, 0)
    added = inferred_node("ScatterND", [(4, 3), (2, 1), (2, 3)], {"reduction": "add"},
                          constants=consts)
    assert (_work(added).vector_ops, _work(added).flops) == (12 + 6, 6)
