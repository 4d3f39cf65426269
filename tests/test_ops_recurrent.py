"""LSTM, GRU and RNN cost functions.

External checks: W, R, B and P are built with the shapes the ONNX operator
specification gives ([dirs, gates*hidden, input], [dirs, gates*hidden, hidden],
[dirs, 2*gates*hidden], [dirs, 3*hidden]); ``onnx.reference`` runs each model
(so the shapes are the spec's), and the weight operands of the GEMMs we map must
cover exactly those parameter counts.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from onnx.reference import ReferenceEvaluator

from gate.ops import Unmodelled, cost_function_for
from gate.ops.elementwise import RECURRENT_ACTIVATION_OPS
from tests.opkit import node, node_from_model, one_node_model

GATES = {"LSTM": 4, "GRU": 3, "RNN": 1}
SETTINGS = settings(max_examples=20, deadline=None)


def _spec_shapes(op: str, size: int, hidden: int, dirs: int) -> dict[str, tuple[int, ...]]:
    gates = GATES[op]
    return {"W": (dirs, gates * hidden, size), "R": (dirs, gates * hidden, hidden),
            "B": (dirs, 2 * gates * hidden), "P": (dirs, 3 * hidden)}


def _recurrent_node(op, seq, batch, size, hidden, direction, layout, bias, peephole, run=True):
    dirs = 2 if direction == "bidirectional" else 1
    spec = _spec_shapes(op, size, hidden, dirs)
    x = (batch, seq, size) if layout else (seq, batch, size)
    inputs = [x, spec["W"], spec["R"], spec["B"] if bias else None]
    if op == "LSTM" and peephole:
        inputs += [None, None, None, spec["P"]]
    rng = np.random.default_rng(3)
    constants = {i: rng.standard_normal(s).astype(np.float32) * 0.1
                 for i, s in enumerate(inputs) if i > 0 and s is not None}
    attrs = {"hidden_size": hidden, "direction": direction, "layout": layout}
    model = one_node_model(op, inputs, attrs, constants=constants)
    if run:  # the spec's executable reference accepts these shapes
        out = ReferenceEvaluator(model).run(None, {"x0": rng.standard_normal(x).astype(np.float32)})
        expected_y = (batch, seq, dirs, hidden) if layout else (seq, dirs, batch, hidden)
        assert out[0].shape == expected_y
    return node_from_model(model), spec


@SETTINGS
@given(st.sampled_from(sorted(GATES)), st.integers(1, 4), st.integers(1, 3), st.integers(1, 5),
       st.integers(1, 4), st.sampled_from(["forward", "reverse", "bidirectional"]),
       st.sampled_from([0, 1]), st.booleans(), st.booleans())
def test_gemms_cover_spec_parameter_counts(op, seq, batch, size, hidden, direction, layout,
                                           bias, peephole):
    n, spec = _recurrent_node(op, seq, batch, size, hidden, direction, layout, bias, peephole)
    dirs = spec["W"][0]
    work = cost_function_for("", op)(n)
    projection, *recurrent = work.gemms
    assert projection.k * projection.n * projection.count == np.prod(spec["W"])
    per_step = sum(g.k * g.n for g in recurrent)
    assert per_step * dirs == np.prod(spec["R"])
    assert all(g.count == seq * dirs and g.sequential == seq for g in recurrent)
    assert projection.sequential == 1 and projection.m == seq * batch
    # ONNX spec equations: every gate of every step computes Xt*W^T + Ht-1*R^T.
    assert work.macs == seq * batch * dirs * GATES[op] * hidden * (size + hidden)
    assert work.flops == 2 * work.macs + work.vector_ops and work.vector_ops > 0


def test_lstm_elementwise_constants():
    n, _ = _recurrent_node("LSTM", 5, 2, 3, 4, "forward", 0, bias=True, peephole=True)
    sigmoid, tanh = RECURRENT_ACTIVATION_OPS["Sigmoid"], RECURRENT_ACTIVATION_OPS["Tanh"]
    # 4 gate sums + 3 cell update + 1 output mul + 8 bias adds + 6 peephole ops
    per_unit = 4 + 3 + 1 + 8 + 6 + 3 * sigmoid + 2 * tanh
    assert cost_function_for("", "LSTM")(n).vector_ops == per_unit * 5 * 2 * 4


def test_gru_linear_before_reset_changes_the_chain_not_the_macs():
    n0, _ = _recurrent_node("GRU", 6, 1, 8, 16, "forward", 0, True, False, run=False)
    n1 = node("GRU", n0.inputs, n0.outputs, dict(n0.attributes, linear_before_reset=1),
              params=n0.param_inputs)
    w0, w1 = cost_function_for("", "GRU")(n0), cost_function_for("", "GRU")(n1)
    assert w0.macs == w1.macs
    assert len(w0.gemms) == 3 and len(w1.gemms) == 2


def test_weight_shape_mismatch_and_unknown_activation_are_unmodelled():
    bad = node("LSTM", [(5, 1, 3), (1, 16, 3), (1, 16, 4)], [None], {"hidden_size": 5})
    with pytest.raises(Unmodelled, match="spec shapes"):
        cost_function_for("", "LSTM")(bad)
    odd = node("RNN", [(5, 1, 3), (1, 4, 3), (1, 4, 4)], [None],
               {"hidden_size": 4, "activations": ["Gaussian"]})
    with pytest.raises(Unmodelled, match="Gaussian"):
        cost_function_for("", "RNN")(odd)


def test_symbolic_sequence_length_is_unmodelled():
    n = node("GRU", [("frames", 1, 3), (1, 12, 3), (1, 12, 4)], [None], {"hidden_size": 4})
    with pytest.raises(Unmodelled, match="--dim frames=N"):
        cost_function_for("", "GRU")(n)
