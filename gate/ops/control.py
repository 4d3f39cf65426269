"""If, Loop and Scan: the cost of their body graphs, where the trip count is known.

Body nodes are costed through the same registry (``cost_function_for``); a body
node without a cost function, or one that is Unmodelled, makes the whole
control-flow node Unmodelled with that reason. Body nodes folded from constants
and fused quantize/dequantize pairs cost nothing, as at the top level. Loop: body x trip count (M, a
constant input); with a condition input too, the trip count is an upper bound.
Scan: body x the scan axis length. If: the taken branch when the condition is
constant (an initializer or Constant, or computed from constants: the loader
folds ``Equal(initializer, Constant)`` and the like), else the costlier branch
(by FLOPs) as an upper bound with a note. The profile charges the parameters
of the same branch (``counted_subgraphs``): a branch that never runs holds no
parameters of the deployed model.
Repeated bodies chain their GEMMs (``sequential``): iterations carry state.
"""

from __future__ import annotations

from contextvars import ContextVar

from gate.model.graph import Graph, Node
from gate.ops._common import add_work, input_shape, repeat_work
from gate.ops.registry import OpWork, Unmodelled, cost_function_for, register

MAX_NESTING = 8
_depth: ContextVar[int] = ContextVar("roofgate_control_depth", default=0)


def _body(node: Node, attribute: str) -> Graph:
    graph = node.subgraphs.get(attribute)
    if graph is None:
        raise Unmodelled(f"{node.op_type} body '{attribute}' is not available")
    return graph


def _node_work(body_node: Node) -> OpWork:
    func = cost_function_for(body_node.domain, body_node.op_type)
    label = f"body node '{body_node.name}' ({body_node.op_type})"
    if func is None:
        raise Unmodelled(f"{label} has no cost model")
    try:
        return func(body_node)
    except Unmodelled as exc:
        raise Unmodelled(f"{label}: {exc.reason}") from None


def graph_work(graph: Graph) -> OpWork:
    """Total work of every node of ``graph``, nesting depth guarded."""
    depth = _depth.get()
    if depth >= MAX_NESTING:
        raise Unmodelled(f"control flow nested deeper than {MAX_NESTING} levels")
    token = _depth.set(depth + 1)
    try:
        return add_work(_node_work(n) for n in graph.nodes if not (n.folded or n.qdq_absorbed))
    finally:
        _depth.reset(token)


def _with_note(work: OpWork, note: str) -> OpWork:
    joined = "; ".join(n for n in (note, work.note) if n)
    return OpWork(work.macs, work.flops, work.gemms, work.vector_ops, False, joined)


@register("Loop")
def loop(node: Node) -> OpWork:
    if node.input(0) is None:
        raise Unmodelled("Loop has no trip count M (it runs until its condition turns false)")
    trip = node.const_values.get(0)
    if not trip:
        raise Unmodelled("Loop trip count M is computed at run time; not modelled")
    if trip[0] < 0:
        raise Unmodelled(f"Loop trip count M={trip[0]} is negative")
    body = graph_work(_body(node, "body"))
    note = f"Loop body x {trip[0]} iterations"
    if node.input(1) is not None:
        note += " (upper bound: the condition may end it early)"
    return _with_note(repeat_work(body, int(trip[0]), sequential=True), note)


@register("Scan")
def scan(node: Node) -> OpWork:
    scans = int(node.attr("num_scan_inputs", 0))
    states = len(node.inputs) - scans
    if scans < 1 or states < 0:
        raise Unmodelled(f"Scan with num_scan_inputs={scans} and {len(node.inputs)} inputs")
    axes = node.attr("scan_input_axes") or [0] * scans
    first = input_shape(node, states, "scan input")
    trip = first[int(axes[0]) % len(first)] if first else 0
    body = graph_work(_body(node, "body"))
    return _with_note(repeat_work(body, trip, sequential=True), f"Scan body x {trip} steps")


def _if_branch(node: Node) -> tuple[str, bool]:
    """(branch counted, condition known): the taken branch, else the costlier one."""
    cond = node.const_values.get(0)
    if cond:
        return ("then_branch" if cond[0] else "else_branch"), True
    works = {name: graph_work(_body(node, name)) for name in ("then_branch", "else_branch")}
    return max(works, key=lambda n: (works[n].flops, works[n].vector_ops)), False


@register("If")
def if_op(node: Node) -> OpWork:
    branch, known = _if_branch(node)
    work = graph_work(_body(node, branch))
    if known:
        return _with_note(work, f"If: condition constant, {branch} only (its parameters only)")
    return _with_note(work, f"If: condition known only at run time, counted the costlier "
                            f"{branch} and its parameters (upper bound)")


def counted_subgraphs(node: Node) -> tuple[str, ...]:
    """The subgraphs whose nodes (and parameters) count for ``node``: for an If the
    branch its cost counts; every body otherwise."""
    if node.op_type != "If" or node.domain or not node.subgraphs:
        return tuple(node.subgraphs)
    try:
        branch, _ = _if_branch(node)
    except Unmodelled:
        return tuple(node.subgraphs)  # the If is unmodelled anyway: keep both
    return (branch,) if branch in node.subgraphs else tuple(node.subgraphs)
