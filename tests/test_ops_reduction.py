"""Reduction, CumSum and TopK cost functions.

External check: nodes built as one-node models and shape-inferred by strict
``onnx.shape_inference`` (output sizes are onnx's, not ours).
"""

from __future__ import annotations

import numpy as np
import pytest

from gate.ops import Unmodelled, cost_function_for
from gate.ops.reduction import REDUCE_OPS
from tests.opkit import inferred_node, node

X = (4, 6, 5)


@pytest.mark.parametrize("op", sorted(REDUCE_OPS))
def test_reductions_visit_every_input_element(op):
    if op.startswith("Arg"):
        n = inferred_node(op, [X], {"axis": 1, "keepdims": 0})
    else:
        n = inferred_node(op, [X, (1,)], {"keepdims": 0}, constants={1: np.array([1])})
    assert n.outputs[0].shape == (4, 5)
    per_input, per_output = REDUCE_OPS[op]
    work = cost_function_for("", op)(n)
    assert work.flops == work.vector_ops == per_input * 120 + per_output * 20


def test_cumsum_and_topk():
    cum = inferred_node("CumSum", [X, ()], constants={1: np.array(1)})
    assert cost_function_for("", "CumSum")(cum).flops == 120
    top = inferred_node("TopK", [X, (1,)], {"axis": -1}, constants={1: np.array([3])}, n_outputs=2)
    assert top.outputs[0].shape == (4, 6, 3)
    assert cost_function_for("", "TopK")(top).flops == 120 * (3).bit_length()


def test_reduction_with_unknown_output_is_unmodelled():
    with pytest.raises(Unmodelled, match="output 0"):
        cost_function_for("", "ReduceMean")(node("ReduceMean", [X], [None]))
