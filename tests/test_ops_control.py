"""If, Loop and Scan: body costs through the registry, trip counts, failure reasons.

Semantics follow the ONNX operator spec: Loop runs its body M times (fewer if the
condition turns false), Scan once per slice along the scan axis, If one branch.
"""

from __future__ import annotations

import pytest

from gate.ops import Unmodelled, cost_function_for
from gate.ops.control import MAX_NESTING
from tests.opkit import graph, node


def _body():
    """One parameter GEMM (1x8 @ 8x8) and a Relu: 64 MACs, 8 vector ops."""
    return graph(node("MatMul", [(1, 8), (8, 8)], [(1, 8)], params=[1], name="fc"),
                 node("Relu", [(1, 8)], [(1, 8)], name="act"))


def _loop(trip=None, cond=False, body=None, name="loop"):
    inputs = [(), (1,) if cond else None, (1, 8)]
    consts = {0: (trip,)} if trip is not None else {}
    return node("Loop", inputs, [(1, 8)], const_values=consts,
                subgraphs={"body": body or _body()}, name=name)


def _cost(n):
    return cost_function_for("", n.op_type)(n)


def test_loop_multiplies_body_by_trip_count_and_chains_gemms():
    work = _cost(_loop(trip=5))
    assert (work.macs, work.vector_ops) == (5 * 64, 5 * 8)
    assert work.flops == 2 * work.macs + work.vector_ops
    (gemm,) = work.gemms
    assert (gemm.count, gemm.sequential, gemm.weights_are_params) == (5, 5, True)
    assert "5 iterations" in work.note and "upper bound" not in work.note


def test_loop_with_condition_is_an_upper_bound():
    assert "upper bound" in _cost(_loop(trip=3, cond=True)).note


def test_loop_without_known_trip_count_is_unmodelled():
    no_m = node("Loop", [None, (1,)], [(1, 8)], subgraphs={"body": _body()})
    with pytest.raises(Unmodelled, match="no trip count"):
        _cost(no_m)
    with pytest.raises(Unmodelled, match="run time"):
        _cost(_loop(trip=None))


def test_unmodelled_body_node_names_itself():
    body = graph(node("FancyOp", [(1, 8)], [(1, 8)], name="mystery"))
    with pytest.raises(Unmodelled, match=r"'mystery' \(FancyOp\) has no cost model"):
        _cost(_loop(trip=2, body=body))
    body = graph(node("Relu", [("t", 8)], [("t", 8)], name="act"))
    with pytest.raises(Unmodelled, match=r"'act' \(Relu\).*--dim t=N"):
        _cost(_loop(trip=2, body=body))


def test_scan_trip_count_is_the_scan_axis_length():
    scan = node("Scan", [(1, 8), (4, 7, 8)], [(1, 8)], {"num_scan_inputs": 1,
                "scan_input_axes": [1]}, subgraphs={"body": _body()})
    work = _cost(scan)
    assert work.macs == 7 * 64 and work.gemms[0].sequential == 7


def test_if_takes_the_constant_branch_else_the_costlier_one():
    cheap = graph(node("Relu", [(1, 8)], [(1, 8)]))
    branches = {"then_branch": _body(), "else_branch": cheap}
    taken = node("If", [(1,)], [(1, 8)], const_values={0: (0,)}, subgraphs=branches)
    assert _cost(taken).macs == 0 and _cost(taken).vector_ops == 8
    unknown = node("If", [(1,)], [(1, 8)], subgraphs=branches)
    work = _cost(unknown)
    assert work.macs == 64 and "upper bound" in work.note and "then_branch" in work.note


def test_missing_body_and_deep_nesting_are_unmodelled():
    with pytest.raises(Unmodelled, match="not available"):
        _cost(node("Loop", [(), None], [(1, 8)], const_values={0: (2,)}))
    nested = _loop(trip=2)
    for level in range(MAX_NESTING + 1):
        nested = _loop(trip=2, body=graph(nested), name=f"loop{level}")
    with pytest.raises(Unmodelled, match="nested deeper"):
        _cost(nested)
    shallow = _loop(trip=2, body=graph(_loop(trip=3)))
    assert _cost(shallow).macs == 2 * 3 * 64
