"""The ONNX ``Attention`` op (opsets 23-25) against its decomposition into standard ops.

External checks:
- the ONNX operator specification for Attention (opset 23): 3-D inputs
  [batch, seq, heads * head_size] with q_num_heads/kv_num_heads, 4-D inputs
  [batch, heads, seq, head_size], grouped-query when kv heads < q heads,
  past_key/past_value concatenated on the sequence axis, is_causal, softcap;
- ``onnx.reference`` runs the fused op and our hand-built decomposition
  (MatMul, Mul, Add, Div/Tanh/Mul, Softmax, MatMul, Reshape/Transpose) and they must
  give the same numbers, so the decomposition is the spec's;
- an execution trace of the decomposition (``traced_macs``) gives its MACs from the
  arrays the reference evaluator really multiplies;
- ``onnx.shape_inference`` sizes the fused op's outputs (the loader runs it).
"""

from __future__ import annotations

import math

import numpy as np
import onnx
import pytest
from onnx import helper
from onnx.reference import ReferenceEvaluator

from gate.model.loader import load_model
from gate.ops import Unmodelled, cost_function_for
from gate.ops.attention import SCALE_OPS_PER_SCORE, SOFTCAP_OPS_PER_SCORE
from gate.ops.normalization import SOFTMAX_OPS_PER_ELEMENT
from gate.profile import profile_model
from tests.opkit import (
    assert_fused_equals_decomposition,
    graph_model,
    inferred_node,
    int_constant,
    node,
    profile_totals,
    scalar_nodes,
    traced_macs,
)

OPSET = 23


def _decomposition(b, hq, hkv, sq, skv, d, dv, rank, past, mask, causal, softcap):
    """Standard-op nodes computing Attention on graph inputs Q, K, V (+ mask, past)."""
    g = hq // hkv
    nodes = [*scalar_nodes("scale", 1 / math.sqrt(d)), int_constant("perm_axes", [2])]
    q, k, v = "Q", "K", "V"
    if rank == 3:  # [B, S, H*D] -> [B, H, S, D]
        for name, heads, size, length in (("Q", hq, d, sq), ("K", hkv, d, skv), ("V", hkv, dv, skv)):
            nodes += [int_constant(f"{name}_split", [b, length, heads, size]),
                      helper.make_node("Reshape", [name, f"{name}_split"], [f"{name}_r"]),
                      helper.make_node("Transpose", [f"{name}_r"], [f"{name}_4"], perm=[0, 2, 1, 3])]
        q, k, v = "Q_4", "K_4", "V_4"
    total = skv
    if past:
        nodes += [helper.make_node("Concat", ["past_key", k], ["present_key"], axis=2),
                  helper.make_node("Concat", ["past_value", v], ["present_value"], axis=2)]
        k, v, total = "present_key", "present_value", skv + past
    nodes += [
        int_constant("q_groups", [b, hkv, g, sq, d]),
        helper.make_node("Reshape", [q, "q_groups"], ["qg"]),
        helper.make_node("Transpose", [k], ["kt"], perm=[0, 1, 3, 2]),
        helper.make_node("Unsqueeze", ["kt", "perm_axes"], ["kt5"]),
        helper.make_node("Unsqueeze", [v, "perm_axes"], ["v5"]),
        helper.make_node("MatMul", ["qg", "kt5"], ["scores"]),
        helper.make_node("Mul", ["scores", "scale"], ["scaled"]),
    ]
    last = "scaled"
    if softcap:  # the spec caps the raw scores, then adds the mask
        nodes += [*scalar_nodes("cap", softcap),
                  helper.make_node("Div", [last, "cap"], ["capped0"]),
                  helper.make_node("Tanh", ["capped0"], ["capped1"]),
                  helper.make_node("Mul", ["capped1", "cap"], ["capped"])]
        last = "capped"
    if mask:
        nodes.append(helper.make_node("Add", [last, "attn_mask"], ["masked"]))
        last = "masked"
    if causal:
        nodes += [int_constant("bias_shape", [sq, total]), int_constant("diag", [1 + total - sq]),
                  helper.make_node("ConstantOfShape", ["bias_shape"], ["neg"],
                                   value=helper.make_tensor("ninf", 1, [1], [-np.inf])),
                  helper.make_node("Trilu", ["neg", "diag"], ["causal_bias"], upper=1),
                  helper.make_node("Add", [last, "causal_bias"], ["causal"])]
        last = "causal"
    nodes += [helper.make_node("Softmax", [last], ["probs"], axis=-1),
              helper.make_node("MatMul", ["probs", "v5"], ["y5"])]
    if rank == 3:
        nodes += [int_constant("y_heads", [b, hq, sq, dv]), int_constant("y_merge", [b, sq, hq * dv]),
                  helper.make_node("Reshape", ["y5", "y_heads"], ["y4"]),
                  helper.make_node("Transpose", ["y4"], ["yt"], perm=[0, 2, 1, 3]),
                  helper.make_node("Reshape", ["yt", "y_merge"], ["Y"])]
    else:
        nodes += [int_constant("y_heads", [b, hq, sq, dv]),
                  helper.make_node("Reshape", ["y5", "y_heads"], ["Y"])]
    return nodes


def _inputs(b, hq, hkv, sq, skv, d, dv, rank, past, mask):
    if rank == 3:
        shapes = {"Q": (b, sq, hq * d), "K": (b, skv, hkv * d), "V": (b, skv, hkv * dv)}
    else:
        shapes = {"Q": (b, hq, sq, d), "K": (b, hkv, skv, d), "V": (b, hkv, skv, dv)}
    if mask:
        shapes["attn_mask"] = (sq, skv + past)
    if past:
        shapes["past_key"] = (b, hkv, past, d)
        shapes["past_value"] = (b, hkv, past, dv)
    return shapes


def _pair(b, hq, hkv, sq, skv, d, dv, rank, past=0, mask=False, causal=False, softcap=0.0):
    shapes = _inputs(b, hq, hkv, sq, skv, d, dv, rank, past, mask)
    attrs = {"is_causal": int(causal)}
    if softcap:
        attrs["softcap"] = softcap
    if rank == 3:
        attrs.update(q_num_heads=hq, kv_num_heads=hkv)
    names = ["Q", "K", "V", "attn_mask" if mask else "", "past_key" if past else "",
             "past_value" if past else ""]
    outputs = ["Y", "present_key", "present_value"] if past else ["Y"]
    fused = graph_model([helper.make_node("Attention", names, outputs, **attrs)], shapes, outputs,
                        opset=OPSET)
    parts = graph_model(_decomposition(b, hq, hkv, sq, skv, d, dv, rank, past, mask, causal,
                                       softcap), shapes, outputs, opset=OPSET)
    return fused, parts, shapes


CASES = [  # b, hq, hkv, sq, skv, d, dv, rank, options
    (2, 4, 4, 5, 5, 8, 8, 4, {}),
    (1, 4, 2, 3, 6, 4, 6, 4, {"mask": True}),  # grouped-query, cross, v head size differs
    (2, 6, 3, 4, 4, 8, 8, 3, {"causal": True}),  # 3-D form, grouped-query
    (1, 2, 1, 3, 3, 4, 4, 3, {"past": 2, "causal": True}),  # multi-query with a cache
    (1, 2, 2, 4, 4, 4, 4, 4, {"softcap": 5.0, "mask": True, "past": 3}),
]


@pytest.mark.parametrize("case", CASES, ids=[str(i) for i in range(len(CASES))])
def test_fused_attention_equals_its_decomposition(case, tmp_path):
    *dims, options = case
    fused, parts, shapes = _pair(*dims, **options)
    rng = np.random.default_rng(0)
    feeds = {name: rng.standard_normal(shape).astype(np.float32) for name, shape in shapes.items()}
    # Source: onnx.reference implements the ONNX Attention spec; the decomposition agrees.
    expected = ReferenceEvaluator(fused).run(None, feeds)
    got = ReferenceEvaluator(parts).run(None, feeds)
    for want, have in zip(expected, got):
        np.testing.assert_allclose(have, want, rtol=1e-4, atol=1e-5)
    fused_totals = profile_totals(fused, tmp_path, "fused")
    parts_totals = profile_totals(parts, tmp_path, "parts")
    # The decomposition's causal bias (ConstantOfShape -> Trilu of constants) folds offline
    # into a stored sq x (past + skv) float constant the fused op never reads: a parameter
    # of the decomposition only (docs/profile.md, folding).
    sq, skv = dims[3], dims[4]
    bias = sq * (options.get("past", 0) + skv) if options.get("causal") else 0
    parts_totals = {**parts_totals, "params": parts_totals["params"] - bias,
                    "param_bytes": parts_totals["param_bytes"] - 4 * bias}
    assert_fused_equals_decomposition(fused_totals, parts_totals)
    # Execution trace: the MACs the reference evaluator really performs.
    assert fused_totals["macs"] == traced_macs(parts, feeds)


def test_core_counts_per_score():
    # 4-D, 2 batches x 4 heads x 5 queries x 7 keys, head 8: spec formula Q K^T then P V.
    n = inferred_node("Attention", [(2, 4, 5, 8), (2, 4, 7, 8), (2, 4, 7, 8)], opset=OPSET)
    work = cost_function_for("", "Attention")(n)
    scores = 2 * 4 * 5 * 7
    assert work.macs == scores * 8 * 2
    assert work.flops == 2 * work.macs + (SCALE_OPS_PER_SCORE + SOFTMAX_OPS_PER_ELEMENT) * scores
    qk, pv = work.gemms
    assert (qk.m, qk.k, qk.n, qk.count, qk.weights_are_params) == (5, 8, 7, 8, False)
    assert (pv.m, pv.k, pv.n, pv.count) == (5, 7, 8, 8)
    capped = inferred_node("Attention", [(2, 4, 5, 8), (2, 4, 7, 8), (2, 4, 7, 8)],
                           {"softcap": 30.0}, opset=OPSET)
    extra = cost_function_for("", "Attention")(capped).flops - work.flops
    assert extra == SOFTCAP_OPS_PER_SCORE * scores


@pytest.mark.parametrize("shapes,attrs", [
    ([(1, 5, 12), (1, 5, 12), (1, 5, 12)], {"q_num_heads": 5, "kv_num_heads": 5}),  # 12 % 5
    ([(1, 5, 12), (1, 5, 12), (1, 5, 12)], {"q_num_heads": 4, "kv_num_heads": 3}),  # 4 % 3
    ([(1, 5, 12), (1, 5, 12), (1, 5, 12)], {}),  # 3-D needs the head counts
    ([(1, 2, 5, 4), (1, 5, 8), (1, 5, 8)], {}),  # mixed ranks
])
def test_inconsistent_heads_are_unmodelled(shapes, attrs):
    with pytest.raises(Unmodelled):
        cost_function_for("", "Attention")(node("Attention", shapes, [(1,)], attrs))


def test_attention_block_at_4096_tokens_is_fully_counted(tmp_path):
    # The case: a block at sequence length 4096 used to hide most of its MACs
    # behind the unmodelled-output proxy. Now every MAC is counted and coverage is full.
    b, heads, seq, head = 1, 8, 4096, 64
    shapes = {"Q": (b, seq, heads * head), "K": (b, seq, heads * head), "V": (b, seq, heads * head)}
    model = graph_model([helper.make_node("Attention", ["Q", "K", "V"], ["Y"], q_num_heads=heads,
                                          kv_num_heads=heads, is_causal=1)],
                        shapes, ["Y"], opset=OPSET)
    path = tmp_path / "block.onnx"
    onnx.save(model, str(path))
    profile = profile_model(load_model(path))
    assert profile.coverage.work_share == 1.0
    assert profile.total_macs == 2 * b * heads * seq * seq * head  # Q K^T and P V
