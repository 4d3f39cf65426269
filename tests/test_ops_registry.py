"""Coverage of the op registry: at least 60 op types, every one a real ONNX op or a contrib op.

External check: ``onnx.defs.has`` (the ONNX operator specification shipped
with the onnx package) knows every registered (domain, op_type) except the
contrib ops, which must each have an output-shape rule and be documented.
"""

from __future__ import annotations

from pathlib import Path

import onnx.defs
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from gate.model.contrib_shapes import contrib_ops_with_shape_rules
from gate.model.graph import TensorInfo
from gate.ops import Unmodelled, cost_function_for, modelled_op_types
from tests.opkit import graph, node

REQUIRED = [
    "Conv", "ConvTranspose", "Gemm", "MatMul", "Einsum", "LSTM", "GRU", "RNN",
    "BatchNormalization", "LayerNormalization", "InstanceNormalization", "Softmax", "MaxPool",
    "AveragePool", "GlobalAveragePool", "GlobalMaxPool", "ReduceSum", "ReduceMean",
    "ReduceMax", "Resize", "Reshape", "Transpose", "Concat", "Split", "Slice", "Gather", "Pad",
    "Expand", "Flatten", "Squeeze", "Unsqueeze", "QLinearConv", "QLinearMatMul", "ConvInteger",
    "MatMulInteger", "QuantizeLinear", "DequantizeLinear", "Constant", "If", "Loop", "Scan",
    "Add", "Sub", "Mul", "Div", "Pow", "Max", "Min", "Sum", "Mean", "Relu", "LeakyRelu",
    "PRelu", "Sigmoid", "Tanh", "HardSigmoid", "HardSwish", "Gelu", "Erf", "Exp", "Log",
    "Sqrt", "Reciprocal", "Neg", "Abs", "Clip", "Elu", "Selu", "Softplus", "Softsign", "Sign",
    "Floor", "Ceil", "Round", "Where", "Equal", "Less", "Greater", "Not", "And", "Or", "Cast"
]


def test_at_least_sixty_op_types():
    assert len(modelled_op_types()) >= 60


def test_every_registered_op_is_in_the_onnx_spec():
    # Contrib ops (com.microsoft, and SimplifiedLayerNormalization of the default domain)
    # are not in the ONNX spec; they are checked below and in tests/test_ops_contrib.py.
    contrib = set(contrib_ops_with_shape_rules())
    unknown = [(d, op) for d, op in modelled_op_types()
               if (d, op) not in contrib and not onnx.defs.has(op, d)]
    assert unknown == []


def test_every_contrib_op_is_documented():
    text = (Path(__file__).parent.parent / "docs" / "ops.md").read_text(encoding="utf-8")
    assert [op for _, op in contrib_ops_with_shape_rules() if op not in text] == []


def test_every_contrib_op_has_an_output_shape_rule():
    # onnx shape inference cannot size a contrib op's outputs without our rule.
    contrib = {(d, op) for d, op in modelled_op_types() if d}
    assert contrib <= set(contrib_ops_with_shape_rules())


def test_every_op_the_issue_lists_is_modelled():
    modelled = {op for domain, op in modelled_op_types() if domain == ""}
    assert sorted(set(REQUIRED) - modelled) == []


# --- Robustness: any node, however malformed, gives OpWork or Unmodelled, never a crash.
# (The profiler turns any other exception into an internal error, exit 3.)

_DIMS = st.one_of(st.integers(0, 5), st.integers(1, 3), st.sampled_from(["seq", "?"]))
_SHAPES = st.one_of(st.none(), st.lists(_DIMS, max_size=5).map(tuple))
_ATTRS = st.fixed_dictionaries({}, optional={
    "axis": st.integers(-6, 6), "group": st.integers(-1, 4),
    "kernel_shape": st.lists(st.integers(-1, 3), max_size=3),
    "strides": st.lists(st.integers(-1, 3), max_size=3), "pads": st.lists(st.integers(-1, 2), max_size=6),
    "dilations": st.lists(st.integers(-1, 3), max_size=3), "axes": st.lists(st.integers(-5, 5), max_size=3),
    "output_padding": st.lists(st.integers(-1, 2), max_size=3), "ceil_mode": st.integers(0, 1),
    "output_shape": st.lists(st.integers(-1, 6), max_size=3), "size": st.integers(-1, 3),
    "scan_input_axes": st.lists(st.integers(-3, 3), max_size=2), "layout": st.integers(0, 1),
    "auto_pad": st.sampled_from(["NOTSET", "SAME_UPPER", "VALID", "BOGUS"]),
    "equation": st.sampled_from(["ij,jk->ik", "...i,...i->...", "ii->i", "ab,bc,cd->ad", "", "i->j"]),
    "hidden_size": st.integers(0, 4), "direction": st.sampled_from(["forward", "bidirectional", "up"]),
    "num_scan_inputs": st.integers(-1, 2), "mode": st.sampled_from(["nearest", "linear", "cubic", "x"]),
    "p": st.integers(0, 3), "num_groups": st.integers(0, 3), "transA": st.integers(0, 1),
    "activations": st.lists(st.sampled_from(["Sigmoid", "Tanh", "Nope"]), max_size=6),
    "approximate": st.sampled_from(["none", "tanh", "erf"]), "training_mode": st.integers(0, 1),
})


def _info(shape, i):
    return None if shape == () and i % 3 == 2 else TensorInfo(f"t{i}", shape, "FLOAT")


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.sampled_from(modelled_op_types()), st.lists(_SHAPES, max_size=9),
       st.lists(_SHAPES, min_size=1, max_size=3), _ATTRS,
       st.dictionaries(st.integers(0, 3), st.lists(st.integers(-1, 3), max_size=2).map(tuple)),
       st.sets(st.integers(0, 8)))
def test_cost_functions_never_crash(op, in_shapes, out_shapes, attrs, consts, params):
    body = graph(node("Relu", [(1, 8)], [(1, 8)]))
    subgraphs = {"body": body, "then_branch": body, "else_branch": body}
    n = node(op[1], [_info(s, i) for i, s in enumerate(in_shapes)],
             [TensorInfo(f"o{i}", s, "FLOAT") for i, s in enumerate(out_shapes)],
             attrs, params=sorted(params), const_values=consts, subgraphs=subgraphs)
    try:
        work = cost_function_for(*op)(n)
    except Unmodelled as exc:
        assert exc.reason
        return
    assert min(work.macs, work.flops, work.vector_ops) >= 0
    assert work.macs == sum(g.macs for g in work.gemms)
    # vector_ops = non-MAC arithmetic + elements moved, so flops sits between these bounds
    assert 2 * work.macs <= work.flops <= 2 * work.macs + work.vector_ops
    assert not (work.is_view and (work.flops or work.vector_ops))
