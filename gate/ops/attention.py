"""Scaled dot-product attention: the opset-23+ ``Attention`` op and the shared core.

The core is what the ONNX operator specification defines for ``Attention``
(opsets 23-25): ``softmax(softcap(Q K^T * scale + bias)) V`` per (batch, query
head), a query head reading key/value head ``h // (q_heads / kv_heads)``
(grouped-query when there are fewer kv heads). Its cost equals the standard-op
decomposition MatMul -> Mul -> [Add] -> [Div, Tanh, Mul] -> Softmax -> MatMul:

- two activation x activation GEMMs per (batch, query head): Q K^T (M = query
  length, K = head size, N = attended length) and P V (K = attended length,
  N = value head size); no parameters;
- per score: 1 scale multiply, 1 bias add when any mask/causal/window/padding
  bias applies, 3 for a softcap (divide, tanh, multiply), 5 for the softmax;
- copies the op writes (present key/value, the optional scores output) are data
  movement (elements written, no FLOPs), as a Concat or Identity would be.

The reshape/transpose of the 3-D form into heads is not counted: a fused kernel
reads the heads with strides. Masked positions are still computed (a plain
kernel computes every score), so causal and windowed attention are upper bounds.
"""

from __future__ import annotations

from dataclasses import dataclass

from gate.model.graph import Node
from gate.ops._common import add_work, arithmetic, input_shape, movement, numel
from gate.ops.normalization import SOFTMAX_OPS_PER_ELEMENT
from gate.ops.registry import GemmShape, OpWork, Unmodelled, register

SCALE_OPS_PER_SCORE = 1  # scores * scale
BIAS_OPS_PER_SCORE = 1  # scores + (mask | causal | window) bias
SOFTCAP_OPS_PER_SCORE = 3  # softcap * tanh(scores / softcap)


@dataclass(frozen=True, slots=True)
class AttentionDims:
    """Sizes of one attention call after the inputs are split into heads."""

    batch: int
    q_heads: int
    kv_heads: int
    q_len: int
    kv_len: int  # attended keys: past + new
    head_size: int
    v_head_size: int

    @property
    def scores(self) -> int:
        return self.batch * self.q_heads * self.q_len * self.kv_len


def check_heads(q_heads: int, kv_heads: int) -> None:
    """Query heads must be a positive multiple of the key/value heads (ONNX Attention spec)."""
    if q_heads < 1 or kv_heads < 1 or q_heads % kv_heads:
        raise Unmodelled(f"{q_heads} query heads are not a multiple of {kv_heads} kv heads")


def split_heads(hidden: int, heads: int, role: str) -> int:
    """Head size of a packed hidden dim; Unmodelled when it does not divide."""
    if heads < 1 or hidden % heads:
        raise Unmodelled(f"{role} hidden size {hidden} does not split into {heads} heads")
    return hidden // heads


def attention_core(dims: AttentionDims, has_bias: bool, softcap: bool = False,
                   extra_ops_per_score: int = 0) -> OpWork:
    """Work of softmax(softcap(Q K^T * scale + bias)) V for ``dims`` (see module docstring)."""
    check_heads(dims.q_heads, dims.kv_heads)
    count = dims.batch * dims.q_heads
    scores_gemm = GemmShape(dims.q_len, dims.head_size, dims.kv_len, count,
                            weights_are_params=False)
    values_gemm = GemmShape(dims.q_len, dims.kv_len, dims.v_head_size, count,
                            weights_are_params=False)
    per_score = (SCALE_OPS_PER_SCORE + SOFTMAX_OPS_PER_ELEMENT + extra_ops_per_score
                 + (BIAS_OPS_PER_SCORE if has_bias else 0)
                 + (SOFTCAP_OPS_PER_SCORE if softcap else 0))
    gemms = (scores_gemm, values_gemm)
    return arithmetic(per_score * dims.scores, macs=sum(g.macs for g in gemms), gemms=gemms)


def ranked_shape(node: Node, position: int, role: str, rank: int) -> tuple[int, ...]:
    """Static shape of input ``position``, which must have ``rank`` dims."""
    shape = input_shape(node, position, role)
    if len(shape) != rank:
        raise Unmodelled(f"{role} must have {rank} dims, got {shape}")
    return shape


def written_elements(node: Node, positions: tuple[int, ...]) -> int:
    """Elements of the named outputs at ``positions`` (copies the op writes)."""
    total = 0
    for position in positions:
        if position < len(node.outputs) and node.outputs[position].name:
            shape = node.outputs[position].shape
            if shape is None or not all(isinstance(d, int) for d in shape):
                raise Unmodelled(f"output {position} '{node.outputs[position].name}' is unsized")
            total += numel(shape)  # type: ignore[arg-type]
    return total


def _onnx_dims(node: Node) -> AttentionDims:
    """AttentionDims of an ONNX ``Attention`` node (3-D or 4-D inputs)."""
    q, k, v = (input_shape(node, i, role) for i, role in enumerate(("Q", "K", "V")))
    if not len(q) == len(k) == len(v) or len(q) not in (3, 4):
        raise Unmodelled(f"Attention needs Q, K, V all 3-D or all 4-D, got {q}, {k}, {v}")
    if len(q) == 4:
        (batch, q_heads, q_len, head), (_, kv_heads, kv_len, _), v_head = q, k, v[3]
    else:
        q_heads = int(node.attr("q_num_heads", 0))
        kv_heads = int(node.attr("kv_num_heads", 0))
        batch, q_len, kv_len = q[0], q[1], k[1]
        head = split_heads(q[2], q_heads, "Q")
        if split_heads(k[2], kv_heads, "K") != head:
            raise Unmodelled(f"Q {q} and K {k} head sizes differ")
        v_head = split_heads(v[2], kv_heads, "V")
    past = node.input(4)
    if past is not None:
        kv_len += ranked_shape(node, 4, "past_key", 4)[2]
    return AttentionDims(batch, q_heads, kv_heads, q_len, kv_len, head, v_head)


def _has_bias(node: Node) -> bool:
    """A bias is added to the scores for a mask, causal masking, a window or padding lengths."""
    windowed = int(node.attr("left_window_size", -1)) >= 0 or int(
        node.attr("right_window_size", -1)) >= 0
    return (node.input(3) is not None or node.input(6) is not None
            or bool(node.attr("is_causal", 0)) or windowed)


@register("Attention")
def attention(node: Node) -> OpWork:
    """ONNX Attention (opsets 23-25): core work plus the present/score outputs as copies."""
    dims = _onnx_dims(node)
    softcap = float(node.attr("softcap", 0.0)) > 0.0
    core = attention_core(dims, _has_bias(node), softcap)
    copies = written_elements(node, (1, 2, 3))
    note = "masked scores counted (upper bound)" if node.attr("is_causal", 0) else ""
    return add_work([core, movement(copies, note=note)])
