"""MatMul, Gemm and Einsum cost functions.

External checks: brute-force loop nests are validated numerically against
``numpy.matmul`` / ``numpy.einsum`` before their MAC count is compared, and
MatMul broadcasting shapes come from ``onnx.shape_inference``.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from gate.ops import Unmodelled, cost_function_for
from tests.opkit import inferred_node, node

SETTINGS = settings(max_examples=30, deadline=None)


def _brute_force_matmul(a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, int]:
    """Numpy-semantics matmul as an explicit loop nest; counts every multiply-accumulate."""
    a2 = a[None, :] if a.ndim == 1 else a
    b2 = b[:, None] if b.ndim == 1 else b
    batch = np.broadcast_shapes(a2.shape[:-2], b2.shape[:-2])
    a3 = np.broadcast_to(a2, batch + a2.shape[-2:])
    b3 = np.broadcast_to(b2, batch + b2.shape[-2:])
    out = np.zeros(batch + (a2.shape[-2], b2.shape[-1]))
    macs = 0
    for idx in itertools.product(*(range(d) for d in batch)):
        for i, j, k in itertools.product(range(a2.shape[-2]), range(b2.shape[-1]), range(a2.shape[-1])):
            out[idx + (i, j)] += a3[idx + (i, k)] * b3[idx + (k, j)]
            macs += 1
    return out, macs


@st.composite
def matmul_shapes(draw):
    m, k, n = (draw(st.integers(1, 4)) for _ in range(3))
    batch = [draw(st.integers(1, 3)) for _ in range(draw(st.integers(0, 2)))]
    a_batch = [d if draw(st.booleans()) else 1 for d in batch][draw(st.integers(0, len(batch))):]
    b_batch = [d if draw(st.booleans()) else 1 for d in batch][draw(st.integers(0, len(batch))):]
    a = (k,) if draw(st.integers(0, 4)) == 0 else (*a_batch, m, k)
    b = (k,) if draw(st.integers(0, 4)) == 0 else (*b_batch, k, n)
    return a, b


@SETTINGS
@given(matmul_shapes(), st.sampled_from([(), (0,), (1,)]))
def test_matmul_macs_equal_brute_force_loop_nest(shapes, params):
    a_shape, b_shape = shapes
    rng = np.random.default_rng(0)
    a, b = rng.standard_normal(a_shape), rng.standard_normal(b_shape)
    expected, macs = _brute_force_matmul(a, b)
    np.testing.assert_allclose(expected.reshape(np.matmul(a, b).shape), np.matmul(a, b))
    n = inferred_node("MatMul", [a_shape, b_shape], params=params)
    work = cost_function_for("", "MatMul")(n)
    assert work.macs == macs == sum(g.macs for g in work.gemms)
    assert work.flops == 2 * macs


def test_matmul_weight_operand_folds_batch_into_rows():
    # Token x hidden activations times an initializer: one GEMM, tokens streamed as M.
    n = inferred_node("MatMul", [(2, 128, 256), (256, 512)], params=[1])
    (g,) = cost_function_for("", "MatMul")(n).gemms
    assert (g.m, g.k, g.n, g.count, g.weights_are_params) == (256, 256, 512, 1, True)


def test_matmul_left_parameter_is_kept_stationary():
    n = inferred_node("MatMul", [(64, 32), (4, 32, 10)], params=[0])
    (g,) = cost_function_for("", "MatMul")(n).gemms
    assert (g.m, g.k, g.n, g.count, g.weights_are_params) == (40, 32, 64, 1, True)


def test_attention_products_are_activation_gemms_per_head():
    scores = inferred_node("MatMul", [(2, 8, 64, 32), (2, 8, 32, 64)])
    (g,) = cost_function_for("", "MatMul")(scores).gemms
    assert (g.m, g.k, g.n, g.count, g.weights_are_params) == (64, 32, 64, 16, False)


@pytest.mark.parametrize("trans_a,trans_b,alpha,beta,bias,extra_per_out", [
    (0, 0, 1.0, 1.0, False, 0), (1, 0, 1.0, 1.0, True, 1), (0, 1, 2.0, 1.0, True, 2),
    (1, 1, 1.0, 0.5, True, 2), (0, 1, 0.5, 0.5, False, 1),
])
def test_gemm_counts(trans_a, trans_b, alpha, beta, bias, extra_per_out):
    m, k, n = 5, 7, 3
    a = (k, m) if trans_a else (m, k)
    b = (n, k) if trans_b else (k, n)
    attrs = {"transA": trans_a, "transB": trans_b, "alpha": alpha, "beta": beta}
    g_node = inferred_node("Gemm", [a, b, (n,) if bias else None], attrs, params=[1, 2])
    work = cost_function_for("", "Gemm")(g_node)
    assert g_node.outputs[0].shape == (m, n)  # onnx shape inference agrees on the output
    assert work.macs == m * k * n
    assert work.flops == 2 * m * k * n + extra_per_out * m * n
    assert work.gemms[0].weights_are_params


EINSUM_FORMS = [
    ("ij,jk->ik", [(3, 4), (4, 5)]),
    ("bij,bjk->bik", [(2, 3, 4), (2, 4, 5)]),
    ("bhqd,bhkd->bhqk", [(1, 2, 3, 4), (1, 2, 5, 4)]),
    ("bhqk,bhkd->bhqd", [(1, 2, 3, 5), (1, 2, 5, 4)]),
    ("...ij,...jk->...ik", [(2, 3, 4), (2, 4, 2)]),
    ("ij,j->i", [(3, 4), (4,)]),
    ("i,i->", [(6,), (6,)]),
    ("bi,bj->bij", [(2, 3), (2, 4)]),
    ("bsh,hd->bsd", [(2, 3, 4), (4, 5)]),
    ("ij,kj", [(3, 4), (5, 4)]),  # implicit output 'ik'
]


def _brute_force_einsum(equation: str, a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, int]:
    lhs, _, rhs = equation.partition("->")
    left, right = lhs.split(",")
    if "->" not in equation:
        rhs = "".join(sorted(c for c in set(left + right) if (left + right).count(c) == 1))
    if "..." in equation:  # the one ellipsis form above: one leading batch dim on both
        left, right, rhs = (t.replace("...", "z") for t in (left, right, rhs))
    sizes = {**dict(zip(left, a.shape)), **dict(zip(right, b.shape))}
    letters = sorted(sizes)
    out = np.zeros(tuple(sizes[c] for c in rhs))
    macs = 0
    for values in itertools.product(*(range(sizes[c]) for c in letters)):
        at = dict(zip(letters, values))
        out[tuple(at[c] for c in rhs)] += a[tuple(at[c] for c in left)] * b[tuple(at[c] for c in right)]
        macs += 1
    return out, macs


@pytest.mark.parametrize("equation,shapes", EINSUM_FORMS)
@pytest.mark.parametrize("params", [(), (1,), (0,)])
def test_einsum_macs_equal_brute_force_loop_nest(equation, shapes, params):
    rng = np.random.default_rng(2)
    a, b = (rng.standard_normal(s) for s in shapes)
    expected, macs = _brute_force_einsum(equation, a, b)
    np.testing.assert_allclose(expected, np.einsum(equation, a, b))
    n = inferred_node("Einsum", shapes, {"equation": equation}, params=params)
    work = cost_function_for("", "Einsum")(n)
    assert work.macs == macs == sum(g.macs for g in work.gemms)
    assert all(g.weights_are_params == bool(params) for g in work.gemms)


def test_einsum_single_operand_forms():
    transpose = node("Einsum", [(3, 4)], [(4, 3)], {"equation": "ij->ji"})
    work = cost_function_for("", "Einsum")(transpose)
    assert (work.flops, work.vector_ops, work.macs) == (0, 12, 0)
    row_sum = node("Einsum", [(3, 4)], [(3,)], {"equation": "ij->i"})
    assert cost_function_for("", "Einsum")(row_sum).flops == 12


@pytest.mark.parametrize("equation,shapes,reason", [
    ("ij,jk,kl->il", [(2, 3), (3, 4), (4, 5)], "three or more"),
    ("ii,ij->ij", [(3, 3), (3, 4)], "diagonal"),
    ("ij,jk->k", [(2, 3), (3, 4)], "one operand only"),
])
def test_einsum_unsupported_forms_are_unmodelled(equation, shapes, reason):
    n = node("Einsum", shapes, [None], {"equation": equation})
    with pytest.raises(Unmodelled, match=reason):
        cost_function_for("", "Einsum")(n)


def test_matmul_symbolic_sequence_names_the_dim():
    n = node("MatMul", [(1, "seq", 64), (64, 64)], [None], params=[1])
    with pytest.raises(Unmodelled, match=r"--dim seq=N"):
        cost_function_for("", "MatMul")(n)
