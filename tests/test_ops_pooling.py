"""Pooling cost functions: window work per output element.

External check: output sizes come from strict ``onnx.shape_inference``; the
spec formula fallback (no inferred output) must give the same count.
"""

from __future__ import annotations

import pytest

from gate.ops import Unmodelled, cost_function_for
from tests.opkit import inferred_node, node


@pytest.mark.parametrize("op,per_window,finish", [("MaxPool", 1, 0), ("AveragePool", 1, 1),
                                                   ("LpPool", 2, 1)])
def test_windowed_pools(op, per_window, finish):
    attrs = {"kernel_shape": [3, 3], "strides": [2, 2], "pads": [1, 1, 1, 1]}
    n = inferred_node(op, [(1, 16, 32, 32)], attrs)
    assert n.outputs[0].shape == (1, 16, 16, 16)
    work = cost_function_for("", op)(n)
    assert work.flops == work.vector_ops == 16 * 16 * 16 * (9 * per_window + finish)
    assert work.macs == 0 and work.gemms == ()
    bare = node(op, [(1, 16, 32, 32)], [None], attrs)  # spec formula path
    assert cost_function_for("", op)(bare).flops == work.flops


@pytest.mark.parametrize("op,per_element,finish", [("GlobalMaxPool", 1, 0),
                                                    ("GlobalAveragePool", 1, 1),
                                                    ("GlobalLpPool", 2, 1)])
def test_global_pools(op, per_element, finish):
    n = inferred_node(op, [(2, 8, 7, 7)])
    assert cost_function_for("", op)(n).flops == 2 * 8 * (49 * per_element + finish)


def test_pool_without_kernel_or_with_symbolic_dims_is_unmodelled():
    with pytest.raises(Unmodelled, match="kernel_shape"):
        cost_function_for("", "MaxPool")(node("MaxPool", [(1, 2, 4, 4)], [None]))
    with pytest.raises(Unmodelled, match="--dim h=N"):
        cost_function_for("", "GlobalAveragePool")(node("GlobalAveragePool", [(1, 2, "h", 4)]))
