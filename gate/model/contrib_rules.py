"""Output-shape rules of the contrib ops roofgate costs (``gate.ops.contrib_*``).

One rule per op (or family), registered with ``@shape_rule``; the mechanism that
teaches them to onnx shape inference is ``gate.model.contrib_shapes``. They live in
the loader's package, not beside the cost functions, so that loading a model never
imports the cost functions (data flows one way: the graph, then its costs). Input
orders and output shapes follow the public contrib-op documentation of the runtime
that defines them (ContribOperators.md), several recalled from memory: see the
docstrings of ``gate/ops/contrib_*.py``. A test (tests/test_ops_registry.py) checks
that every contrib op with a cost function has a rule here.
"""

from __future__ import annotations

from onnx import TensorProto, TypeProto

from gate.model.contrib_shapes import (
    Facts,
    Rule,
    add_dims,
    as_standard,
    same_as,
    shape_rule,
    tensor_type,
    times_dims,
)

# --- fused matrix ops (gate/ops/contrib_fused.py)

shape_rule("FusedConv")(as_standard("Conv", (0, 1, 2)))
shape_rule("FusedGemm")(as_standard("Gemm", (0, 1, 2)))


_MATMUL_SHAPE = as_standard("MatMul", (0, 1))


@shape_rule("FusedMatMul")
def _fused_matmul_shape(facts: Facts) -> list[TypeProto | None]:
    """MatMul's output shape on the operands as transposed by transA/transB."""
    for position, flag in ((0, "transA"), (1, "transB")):
        dims = facts.dims(position)
        if facts.attr(flag, 0) and dims is not None and len(dims) >= 2:
            swapped = [*dims[:-2], dims[-1], dims[-2]]
            facts = facts.with_input(position, tensor_type(facts.elem(position), swapped))
    return _MATMUL_SHAPE(facts)


@shape_rule("MatMulNBits")
def _matmul_nbits_shape(facts: Facts) -> list[TypeProto | None]:
    a = facts.dims(0)
    n = int(facts.attr("N", 0))
    if a is None or n < 1:
        return [None]
    return [tensor_type(facts.elem(0), [*a[:-1], n])]


# --- fused elementwise and normalisation ops (gate/ops/contrib_elementwise.py)

shape_rule("Gelu", "BiasGelu", "FastGelu", "QuickGelu", "BiasAdd")(same_as(0))


def _statistics_type(facts: Facts, axis: int) -> TypeProto | None:
    """Mean / inverse std outputs: the input shape with the normalised axes set to 1 (float)."""
    x = facts.dims(0)
    if x is None:
        return None
    axis %= max(len(x), 1)
    return tensor_type(TensorProto.FLOAT, [*x[:axis], *([1] * (len(x) - axis))])


@shape_rule("SkipLayerNormalization", "SkipSimplifiedLayerNormalization")
def _skip_norm_shape(facts: Facts) -> list[TypeProto | None]:
    stats = _statistics_type(facts, -1)
    return [facts.tensor(0), stats, stats, facts.tensor(0)]


@shape_rule("EmbedLayerNormalization")
def _embed_norm_shape(facts: Facts) -> list[TypeProto | None]:
    ids, word = facts.dims(0), facts.dims(2)
    if ids is None or word is None or len(ids) != 2 or len(word) != 2:
        return [None]
    output = tensor_type(facts.elem(2), [*ids, word[1]])
    return [output, tensor_type(TensorProto.INT32, [ids[0]]), output]


@shape_rule("SimplifiedLayerNormalization", domain="")
@shape_rule("SimplifiedLayerNormalization")
def _simplified_norm_shape(facts: Facts) -> list[TypeProto | None]:
    return [facts.tensor(0), _statistics_type(facts, int(facts.attr("axis", -1)))]


# --- QOperator ops (gate/ops/contrib_quantized.py)

shape_rule("QLinearSigmoid", "QLinearLeakyRelu", "QLinearSoftmax")(same_as(0))


@shape_rule("QLinearAdd", "QLinearMul")
def _qlinear_binary_shape(facts: Facts) -> list[TypeProto | None]:
    return [as_standard("Add", (0, 3))(facts)[0]]


@shape_rule("QLinearConcat")
def _qlinear_concat_shape(facts: Facts) -> list[TypeProto | None]:
    positions = tuple(range(2, len(facts.inputs), 3))
    return [as_standard("Concat", positions)(facts)[0]]


def _pool_shape(op_type: str) -> Rule:
    """The standard pool's output shape; ``channels_last=1`` permutes NHWC to NCHW and back."""
    standard = as_standard(op_type, (0,))

    def rule(facts: Facts) -> list[TypeProto | None]:
        x = facts.dims(0)
        if not facts.attr("channels_last", 0) or x is None or len(x) < 3:
            return standard(facts)
        nchw = facts.with_input(0, tensor_type(facts.elem(0), [x[0], x[-1], *x[1:-1]]),
                                hidden_attr="channels_last")
        (out,) = standard(nchw)
        if out is None:
            return [None]
        dims = [d.dim_value if d.HasField("dim_value") else None
                for d in out.tensor_type.shape.dim]
        return [tensor_type(facts.elem(0), [dims[0], *dims[2:], dims[1]])]

    return rule


shape_rule("DynamicQuantizeMatMul")(as_standard("MatMul", (0, 1)))
shape_rule("QLinearGlobalAveragePool")(_pool_shape("GlobalAveragePool"))
shape_rule("QLinearAveragePool")(_pool_shape("AveragePool"))


@shape_rule("QGemm")
def _qgemm_shape(facts: Facts) -> list[TypeProto | None]:
    (out,) = as_standard("Gemm", (0, 3))(facts)
    if out is None:
        return [None]
    if facts.tensor(7) is None:  # no y_scale: a float output
        out.tensor_type.elem_type = TensorProto.FLOAT
    else:  # the y_zero_point's type (uint8 without one)
        out.tensor_type.elem_type = facts.elem(8) if facts.tensor(8) is not None else TensorProto.UINT8
    return [out]


# --- attention and rotary embedding (gate/ops/contrib_attention.py)

shape_rule("RotaryEmbedding")(same_as(0))


@shape_rule("Attention")
def _ms_attention_shape(facts: Facts) -> list[TypeProto | None]:
    x, weights, past = facts.dims(0), facts.dims(1), facts.dims(4)
    heads = int(facts.attr("num_heads", 0))
    sizes = list(facts.attr("qkv_hidden_sizes", []))
    if x is None or len(x) != 3 or weights is None or len(weights) != 2 or heads < 1:
        return [None, None]
    if not sizes and isinstance(weights[1], int):
        sizes = [weights[1] // 3] * 3
    if len(sizes) != 3:
        return [None, None]
    shared = bool(facts.attr("past_present_share_buffer", 0))
    total = x[1] if past is None or len(past) != 5 else (
        past[3] if shared else add_dims(past[3], x[1]))  # a shared buffer keeps its length
    present = [2, x[0], heads, total, sizes[1] // heads]
    return [tensor_type(facts.elem(0), [x[0], x[1], sizes[2]]),
            tensor_type(facts.elem(0), present)]


@shape_rule("MultiHeadAttention")
def _mha_shape(facts: Facts) -> list[TypeProto | None]:
    q, k, v, past = facts.dims(0), facts.dims(1), facts.dims(2), facts.dims(6)
    heads = int(facts.attr("num_heads", 0))
    if q is None or heads < 1:
        return [None]
    if len(q) == 5:
        kv_len, head, v_head, out = q[1], q[4], q[4], times_dims(q[2], q[4])
    elif k is not None and len(k) == 5:
        kv_len, v_head, head = k[1], k[4], k[4]
        out = times_dims(heads, k[4])
    elif k is not None and v is not None and len(k) in (3, 4) and len(k) == len(v):
        four = len(k) == 4
        kv_len = k[2] if four else k[1]
        v_head = v[3] if four else (v[2] // heads if isinstance(v[2], int) else None)
        head = k[3] if four else (k[2] // heads if isinstance(k[2], int) else None)
        out = times_dims(heads, v_head)
    else:
        return [None]
    total = add_dims(past[2], kv_len) if past is not None and len(past) == 4 else kv_len
    return [tensor_type(facts.elem(0), [q[0], q[1], out]),
            tensor_type(facts.elem(0), [q[0], heads, total, head]),
            tensor_type(facts.elem(0), [q[0], heads, total, v_head])]


@shape_rule("GroupQueryAttention")
def _gqa_shape(facts: Facts) -> list[TypeProto | None]:
    q, past = facts.dims(0), facts.dims(3)
    heads, kv_heads = int(facts.attr("num_heads", 0)), int(facts.attr("kv_num_heads", 0))
    if q is None or len(q) != 3 or heads < 1 or kv_heads < 1 or not isinstance(q[2], int):
        return [None]
    packed = facts.tensor(1) is None
    head = q[2] // (heads + 2 * kv_heads) if packed else q[2] // heads
    total = add_dims(past[2], q[1]) if past is not None and len(past) == 4 else q[1]
    present = tensor_type(facts.elem(0), [q[0], kv_heads, total, head])
    return [tensor_type(facts.elem(0), [q[0], q[1], heads * head]), present, present]
