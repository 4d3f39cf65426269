"""Attention and rotary-embedding ops of the ``com.microsoft`` domain (and standard RotaryEmbedding).

Each reuses the scaled dot-product core of ``gate.ops.attention`` and costs its
decomposition into standard ops:

- ``Attention`` = MatMul(input, packed QKV weights) [+ Add bias] [+ RotaryEmbedding of
  Q and K with ``do_rotary``] + the ONNX Attention core (``unidirectional`` = causal,
  ``attention_bias`` and ``mask_index`` add to the scores; ``past_present_share_buffer``
  attends over the whole shared buffer);
- ``MultiHeadAttention`` = [Add of the packed Q/K/V bias] + the ONNX Attention core
  (3-D query/key/value, 4-D key/value already split into heads, packed QKV
  ``[B, S, N, 3, H]`` or packed KV ``[B, L, N, 2, H]``);
- ``GroupQueryAttention`` = [rotary embedding of Q and K] + the causal grouped-query
  core over the present cache (a ``local_window_size`` window masks the same scores;
  ``smooth_softmax`` adds one zero logit per softmax row);
- ``RotaryEmbedding`` (both domains) = per rotated element x1*cos - x2*sin (or
  x2*cos + x1*sin): 2 multiplies and 1 add; the cos/sin gathers and the elements
  beyond ``rotary_embedding_dim`` are copies.

Input orders follow the public contrib-op documentation (ContribOperators.md):
Attention (input, weights, bias, mask_index, past, attention_bias,
past_sequence_length), MultiHeadAttention (query, key, value, bias,
key_padding_mask, attention_bias, past_key, past_value), GroupQueryAttention (query,
key, value, past_key, past_value, seqlens_k, total_sequence_length, cos_cache,
sin_cache), RotaryEmbedding (input, position_ids, cos_cache, sin_cache; the standard
op puts position_ids last). MultiHeadAttention's packed layouts and the GQA cache
length (past + new tokens, no shared buffer) are from memory.
"""

from __future__ import annotations

from gate.model.graph import Node
from gate.ops._common import add_work, arithmetic, input_shape, movement, numel
from gate.ops.attention import (
    AttentionDims,
    attention_core,
    ranked_shape,
    split_heads,
    written_elements,
)
from gate.ops.matmul import orient_gemm
from gate.ops.normalization import SOFTMAX_OPS_PER_ELEMENT
from gate.ops.registry import OpWork, Unmodelled, register

MS = "com.microsoft"
ROTARY_OPS_PER_ROTATED_ELEMENT = 3  # two multiplies, one add or subtract


def _bias_terms(node: Node, positions: tuple[int, ...], causal: bool) -> int:
    """Bias adds per score: one per mask/bias input given, one for causal masking."""
    return sum(node.input(p) is not None for p in positions) + int(causal)


def _core(dims: AttentionDims, bias_terms: int, softcap: bool = False) -> OpWork:
    extra = max(bias_terms - 1, 0)
    return attention_core(dims, has_bias=bias_terms > 0, softcap=softcap, extra_ops_per_score=extra)


def _ms_attention_sizes(node: Node) -> tuple[int, int, int]:
    """(q/k hidden, v hidden, heads) of com.microsoft Attention."""
    heads = int(node.attr("num_heads", 0))
    weights = input_shape(node, 1, "weights")
    sizes = [int(s) for s in node.attr("qkv_hidden_sizes", [])]
    if not sizes and len(weights) == 2 and weights[1] % 3 == 0:
        sizes = [weights[1] // 3] * 3
    if len(sizes) != 3 or sizes[0] != sizes[1] or len(weights) != 2 or sum(sizes) != weights[1]:
        raise Unmodelled(f"Attention weights {weights} do not split into Q, K, V {sizes}")
    return sizes[0], sizes[2], heads


def _rotary_ops(dims: AttentionDims, rotated: int) -> int:
    """RotaryEmbedding of the new query and key tokens (the past is stored rotated)."""
    if rotated < 2 or rotated % 2 or rotated > dims.head_size:
        raise Unmodelled(f"rotary dim {rotated} does not fit head size {dims.head_size}")
    return (ROTARY_OPS_PER_ROTATED_ELEMENT * dims.batch * dims.q_len
            * (dims.q_heads + dims.kv_heads) * rotated)


@register("Attention", domain=MS)
def ms_attention(node: Node) -> OpWork:
    """``do_rotary`` adds the RotaryEmbedding of Q and K (``rotary_embedding_dim``, default
    the head size: from memory); ``past_present_share_buffer`` attends over the whole
    shared cache buffer (an upper bound: its filled length is a run-time input) and
    writes only the new tokens into it."""
    x = input_shape(node, 0, "input")
    if len(x) != 3:
        raise Unmodelled(f"Attention input must be [batch, seq, hidden], got {x}")
    qk_hidden, v_hidden, heads = _ms_attention_sizes(node)
    batch, seq, hidden_in = x
    projection = orient_gemm(batch * seq, hidden_in, 2 * qk_hidden + v_hidden, 1, False,
                             node.is_param(1), fold_batch=True)
    bias = projection.m * projection.n if node.input(2) is not None else 0
    shared = bool(node.attr("past_present_share_buffer", 0))
    past = ranked_shape(node, 4, "past", 5)[3] if node.input(4) is not None else 0
    if shared and not past:
        raise Unmodelled("Attention past_present_share_buffer without a past buffer")
    attended = past if shared else past + seq
    dims = AttentionDims(batch, heads, heads, seq, attended, split_heads(qk_hidden, heads, "Q"),
                         split_heads(v_hidden, heads, "V"))
    core = _core(dims, _bias_terms(node, (3, 5), bool(node.attr("unidirectional", 0))))
    rotary = (_rotary_ops(dims, int(node.attr("rotary_embedding_dim", 0)) or dims.head_size)
              if node.attr("do_rotary", 0) else 0)
    copies = (batch * seq * heads * (dims.head_size + dims.v_head_size) if shared
              else written_elements(node, (1,)))
    return add_work([arithmetic(bias + rotary, macs=projection.macs, gemms=(projection,)), core,
                     movement(copies)])


def _mha_dims(node: Node) -> tuple[AttentionDims, int]:
    """AttentionDims of MultiHeadAttention and the elements its bias input is added to."""
    heads = int(node.attr("num_heads", 0))
    q = input_shape(node, 0, "query")
    if len(q) == 5:  # packed QKV [B, S, N, 3, H]
        batch, seq, heads, _, head = q
        return AttentionDims(batch, heads, heads, seq, seq, head, head), 0
    k = input_shape(node, 1, "key")
    if len(q) != 3:
        raise Unmodelled(f"MultiHeadAttention query must be 3-D or packed 5-D, got {q}")
    batch, seq, hidden = q
    head = split_heads(hidden, heads, "query")
    if len(k) == 5:  # packed KV [B, L, N, 2, H]
        kv_len, v_head, biased = k[1], k[4], 0
    elif len(k) == 4:  # [B, N, L, H] already projected and split
        kv_len, v_head, biased = k[2], ranked_shape(node, 2, "value", 4)[3], 0
    else:
        v = ranked_shape(node, 2, "value", 3)
        kv_len, v_head = k[1], split_heads(v[2], heads, "value")
        biased = numel(q) + numel(k) + numel(v)
    past = ranked_shape(node, 6, "past_key", 4)[2] if node.input(6) is not None else 0
    return AttentionDims(batch, heads, heads, seq, past + kv_len, head, v_head), biased


@register("MultiHeadAttention", domain=MS)
def multi_head_attention(node: Node) -> OpWork:
    dims, biased = _mha_dims(node)
    bias = biased if node.input(3) is not None else 0
    core = _core(dims, _bias_terms(node, (4, 5), bool(node.attr("unidirectional", 0))))
    return add_work([arithmetic(bias), core, movement(written_elements(node, (1, 2, 3)))])


def _gqa_dims(node: Node) -> AttentionDims:
    heads, kv_heads = int(node.attr("num_heads", 0)), int(node.attr("kv_num_heads", 0))
    q = input_shape(node, 0, "query")
    if len(q) != 3:
        raise Unmodelled(f"GroupQueryAttention query must be [batch, seq, hidden], got {q}")
    batch, seq, hidden = q
    packed = node.input(1) is None
    head = split_heads(hidden, heads + 2 * kv_heads, "packed QKV") if packed else split_heads(
        hidden, heads, "query")
    past = ranked_shape(node, 3, "past_key", 4)[2] if node.input(3) is not None else 0
    return AttentionDims(batch, heads, kv_heads, seq, past + seq, head, head)


@register("GroupQueryAttention", domain=MS)
def group_query_attention(node: Node) -> OpWork:
    """Always causal; the cache is taken to hold exactly the past tokens (no shared buffer).

    ``local_window_size`` narrows the causal mask to a sliding window: the same one bias
    per score, every score still computed (an upper bound, as for ONNX Attention's
    ``left_window_size``). ``smooth_softmax`` adds a zero logit to each softmax row (from
    memory): one more softmax element per query row and head.
    """
    dims = _gqa_dims(node)
    rotary = 0
    if node.attr("do_rotary", 0):
        rotary = _rotary_ops(dims, 2 * ranked_shape(node, 7, "cos_cache", 2)[1])
    core = _core(dims, 1, softcap=float(node.attr("softcap", 0.0)) > 0.0)
    smooth = (SOFTMAX_OPS_PER_ELEMENT * dims.batch * dims.q_heads * dims.q_len
              if node.attr("smooth_softmax", 0) else 0)
    windowed = int(node.attr("local_window_size", -1)) >= 0
    note = "sliding-window scores counted in full (upper bound)" if windowed else ""
    return add_work([arithmetic(rotary + smooth), core,
                     movement(written_elements(node, (1, 2)), note=note)])


def _rotary_work(node: Node, cos_pos: int) -> OpWork:
    """Rotated elements cost 3 ops; the rest of each head is copied."""
    x = input_shape(node, 0, "input")
    cos = input_shape(node, cos_pos, "cos_cache")
    if not cos:
        raise Unmodelled("cos_cache is a scalar")
    half = cos[-1]
    rotated = int(node.attr("rotary_embedding_dim", 0)) or 2 * half
    heads = int(node.attr("num_heads", 0))
    if len(x) == 4:
        head = x[3]
    elif len(x) == 3:
        head = split_heads(x[2], heads, "input") if heads else rotated
    else:
        raise Unmodelled(f"RotaryEmbedding input must be 3-D or 4-D, got {x}")
    if head < 1 or rotated > head or rotated % 2 or rotated != 2 * half:
        raise Unmodelled(f"rotary dim {rotated} does not fit head size {head} and cache {half}")
    rotated_elements = numel(x) // head * rotated
    return add_work([arithmetic(ROTARY_OPS_PER_ROTATED_ELEMENT * rotated_elements),
                     movement(numel(x) - rotated_elements)])


@register("RotaryEmbedding", domain=MS)
def ms_rotary_embedding(node: Node) -> OpWork:
    return _rotary_work(node, cos_pos=2)


@register("RotaryEmbedding")
def rotary_embedding(node: Node) -> OpWork:
    return _rotary_work(node, cos_pos=1)
