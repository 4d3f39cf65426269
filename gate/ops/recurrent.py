"""LSTM, GRU and RNN: the two GEMMs of every recurrent layer plus its gate arithmetic.

Chosen mapping (used consistently): the input projection X_t W^T of all time
steps is one batched GEMM (M = seq x batch, K = input size, N = gates x hidden,
count = directions, not sequential); the recurrent projection H_{t-1} R^T is
one GEMM per step and direction (M = batch, K = hidden, N = gates x hidden,
count = seq x directions, sequential = seq), a dependency chain that cannot
overlap. GRU with linear_before_reset=0 needs r_t before the candidate's
recurrent product, so its recurrent part is two chained GEMMs per step (z,r
then h). With ``sequence_lens`` the full padded length is counted (upper bound).
Weights (W, R) are treated as parameters even when fed through DequantizeLinear.
"""

from __future__ import annotations

from dataclasses import dataclass

from gate.model.graph import Node
from gate.ops._common import arithmetic, input_shape, str_attr
from gate.ops.elementwise import RECURRENT_ACTIVATION_OPS
from gate.ops.registry import GemmShape, OpWork, Unmodelled, register


@dataclass(frozen=True)
class _Cell:
    gates: int
    default_activations: tuple[str, ...]
    combine_ops: int  # per hidden unit: input + recurrent projection sums, cell update
    bias_ops: int  # per hidden unit when B is given (Wb and Rb adds)


_CELLS = {
    # LSTM: 4 gate sums; C_t = f*C + i*g (3); H_t = o*h(C_t) (1 mul)
    "LSTM": _Cell(4, ("Sigmoid", "Tanh", "Tanh"), 4 + 3 + 1, 8),
    # GRU: 3 gate sums; r applied to the candidate's recurrent part (1);
    # H_t = (1 - z)*h~ + z*H (4)
    "GRU": _Cell(3, ("Sigmoid", "Tanh"), 3 + 1 + 4, 6),
    # RNN: 1 sum of the two projections
    "RNN": _Cell(1, ("Tanh",), 1, 2),
}
_LSTM_PEEPHOLE_OPS = 6  # P_i*C, P_f*C, P_o*C and their adds, per hidden unit
_DIRECTIONS = {"forward": 1, "reverse": 1, "bidirectional": 2}


def _dims(node: Node, cell: _Cell) -> tuple[int, int, int, int, int]:
    """(seq, batch, input_size, hidden, directions) checked against the spec's W and R shapes."""
    x = input_shape(node, 0, "X")
    w = input_shape(node, 1, "W")
    r = input_shape(node, 2, "R")
    if len(x) != 3 or len(w) != 3 or len(r) != 3:
        raise Unmodelled(f"X, W, R must be 3-D, got {x}, {w}, {r}")
    seq, batch, size = (x[1], x[0], x[2]) if node.attr("layout", 0) else x
    directions = _DIRECTIONS.get(str_attr(node, "direction", "forward"))
    if directions is None:
        raise Unmodelled(f"direction={node.attr('direction')!r} is not an ONNX direction")
    hidden = int(node.attr("hidden_size", r[2]))
    expected_w = (directions, cell.gates * hidden, size)
    if w != expected_w or r != (directions, cell.gates * hidden, hidden):
        raise Unmodelled(f"W {w} / R {r} do not match the spec shapes for "
                         f"hidden_size={hidden}, input size {size}, {directions} direction(s)")
    return seq, batch, size, hidden, directions


def _activation_ops(node: Node, cell: _Cell, directions: int) -> int:
    """Activation operations per hidden unit summed over directions."""
    names = node.attr("activations") or list(cell.default_activations) * directions
    names = [n.decode() if isinstance(n, bytes) else str(n) for n in names]
    if len(names) != len(cell.default_activations) * directions:
        raise Unmodelled(f"activations list {names} has the wrong length")
    unknown = [n for n in names if n not in RECURRENT_ACTIVATION_OPS]
    if unknown:
        raise Unmodelled(f"recurrent activation {unknown[0]!r} is not modelled")
    per_gate = {"LSTM": (3, 1, 1), "GRU": (2, 1), "RNN": (1,)}[node.op_type]
    total = 0
    for start in range(0, len(names), len(per_gate)):
        total += sum(RECURRENT_ACTIVATION_OPS[n] * uses
                     for n, uses in zip(names[start:start + len(per_gate)], per_gate))
    return total


def _gemms(node: Node, cell: _Cell, seq: int, batch: int, size: int, hidden: int,
           directions: int) -> tuple[GemmShape, ...]:
    projection = GemmShape(m=seq * batch, k=size, n=cell.gates * hidden, count=directions)
    steps = seq * directions
    if node.op_type == "GRU" and not node.attr("linear_before_reset", 0):
        return (projection,
                GemmShape(batch, hidden, 2 * hidden, steps, True, sequential=seq),
                GemmShape(batch, hidden, hidden, steps, True, sequential=seq))
    return (projection,
            GemmShape(batch, hidden, cell.gates * hidden, steps, True, sequential=seq))


def recurrent_work(node: Node) -> OpWork:
    """Work of one LSTM/GRU/RNN layer over the whole sequence and all directions."""
    cell = _CELLS[node.op_type]
    seq, batch, size, hidden, directions = _dims(node, cell)
    per_unit = cell.combine_ops * directions + _activation_ops(node, cell, directions)
    if node.input(3) is not None:
        per_unit += cell.bias_ops * directions
    if node.op_type == "LSTM" and node.input(7) is not None:
        per_unit += _LSTM_PEEPHOLE_OPS * directions
    if node.attr("clip") is not None:
        per_unit += 2 * cell.gates * directions  # min and max on every gate pre-activation
    gemms = _gemms(node, cell, seq, batch, size, hidden, directions)
    note = "sequence_lens given: counted the full padded length" if node.input(4) else ""
    return arithmetic(per_unit * seq * batch * hidden, macs=sum(g.macs for g in gemms),
                      gemms=gemms, note=note)


register("LSTM", "GRU", "RNN")(recurrent_work)
