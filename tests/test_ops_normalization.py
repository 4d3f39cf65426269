"""Normalisation and softmax cost functions: per-element and per-row constants.

External check: each node is a one-node model accepted by strict
``onnx.shape_inference`` (valid inputs and attributes per the ONNX spec).
"""

from __future__ import annotations

import pytest

from gate.ops import Unmodelled, cost_function_for
from gate.ops import normalization as nm
from tests.opkit import inferred_node, node

X = (2, 8, 5, 5)  # 400 elements, 16 (N, C) rows


def _work(op, shapes, attrs=None, opset=21):
    return cost_function_for("", op)(inferred_node(op, shapes, attrs, params=[1, 2], opset=opset))


def test_batch_normalization_inference():
    work = _work("BatchNormalization", [X, (8,), (8,), (8,), (8,)])
    assert work.flops == nm.BATCHNORM_OPS_PER_ELEMENT * 400 + nm.BATCHNORM_OPS_PER_CHANNEL * 8
    assert work.macs == 0 and work.gemms == ()


def test_batch_normalization_training_mode_is_unmodelled():
    n = node("BatchNormalization", [X, (8,), (8,), (8,), (8,)], [X], {"training_mode": 1})
    with pytest.raises(Unmodelled, match="training_mode"):
        cost_function_for("", "BatchNormalization")(n)


@pytest.mark.parametrize("axis,rows", [(-1, 80), (1, 2), (0, 1)])
def test_layer_normalization_rows_follow_axis(axis, rows):
    work = _work("LayerNormalization", [X, X[axis:] if axis else X, None], {"axis": axis})
    per_element = nm.MOMENT_NORM_OPS_PER_ELEMENT - 1  # no bias input
    assert work.flops == per_element * 400 + nm.MOMENT_NORM_OPS_PER_ROW * rows


def test_instance_and_group_normalization():
    inst = _work("InstanceNormalization", [X, (8,), (8,)])
    assert inst.flops == nm.MOMENT_NORM_OPS_PER_ELEMENT * 400 + nm.MOMENT_NORM_OPS_PER_ROW * 16
    group = _work("GroupNormalization", [X, (8,), (8,)], {"num_groups": 4})
    assert group.flops == nm.MOMENT_NORM_OPS_PER_ELEMENT * 400 + nm.MOMENT_NORM_OPS_PER_ROW * 8


def test_rms_normalization():
    work = _work("RMSNormalization", [X, (5,)], {"axis": -1}, opset=23)
    assert work.flops == nm.RMS_NORM_OPS_PER_ELEMENT * 400 + nm.RMS_NORM_OPS_PER_ROW * 80


def test_softmax_family():
    assert _work("Softmax", [X]).flops == nm.SOFTMAX_OPS_PER_ELEMENT * 400
    assert _work("LogSoftmax", [X]).flops == (nm.LOG_SOFTMAX_OPS_PER_ELEMENT * 400
                                              + nm.LOG_SOFTMAX_OPS_PER_ROW * 80)
    assert _work("Hardmax", [X]).flops == nm.HARDMAX_OPS_PER_ELEMENT * 400


def test_other_normalizations_are_positive_and_invariant():
    for op, attrs in [("LpNormalization", {"p": 2}), ("LRN", {"size": 3}),
                      ("MeanVarianceNormalization", {"axes": [0, 2, 3]})]:
        work = _work(op, [X], attrs)
        assert work.flops == work.vector_ops > 400


def test_bad_axis_is_unmodelled():
    with pytest.raises(Unmodelled, match="axis"):
        cost_function_for("", "Softmax")(node("Softmax", [X], [X], {"axis": 7}))
