"""Einsum: one-operand reductions/transposes and two-operand contractions.

Two-operand forms map to a GEMM by index class: batch indices (both inputs and
the output), contracted (both inputs, not the output), M (left input and output
only) and N (right input and output only). MACs are the product of every
distinct index size (the full loop nest). Forms outside that (three or more
operands, a diagonal, an index summed out of one operand only) are Unmodelled.
"""

from __future__ import annotations

from collections.abc import Sequence
from math import prod

from gate.ops._common import arithmetic, movement
from gate.ops.registry import OpWork, Unmodelled

_ELLIPSIS_LETTERS = "0123456789"  # stand-ins for ellipsis dims; never valid einsum letters


def _expand_term(term: str, rank: int, ellipsis: str) -> str:
    if "..." not in term:
        if len(term) != rank:
            raise Unmodelled(f"einsum term '{term}' does not match an input of rank {rank}")
        return term
    width = rank - (len(term) - 3)
    if width < 0:
        raise Unmodelled(f"einsum term '{term}' does not match an input of rank {rank}")
    return term.replace("...", ellipsis[len(ellipsis) - width:] if width else "")


def parse_equation(equation: str, ranks: Sequence[int]) -> tuple[list[str], str]:
    """Input index strings and the output index string, ellipses expanded."""
    lhs, arrow, rhs = equation.replace(" ", "").partition("->")
    terms = lhs.split(",")
    if not equation or len(terms) != len(ranks):
        raise Unmodelled(f"einsum equation '{equation}' does not match {len(ranks)} inputs")
    widths = [r - (len(t) - 3) for t, r in zip(terms, ranks) if "..." in t]
    ellipsis = _ELLIPSIS_LETTERS[:max(widths, default=0)]
    inputs = [_expand_term(t, r, ellipsis) for t, r in zip(terms, ranks)]
    if arrow:
        output = rhs.replace("...", ellipsis)
    else:
        letters = "".join(inputs)
        once = sorted(c for c in set(letters) if letters.count(c) == 1 and c not in ellipsis)
        output = ellipsis + "".join(once)
    return inputs, output


def _index_sizes(inputs: list[str], shapes: Sequence[Sequence[int]]) -> dict[str, int]:
    sizes: dict[str, int] = {}
    for term, shape in zip(inputs, shapes):
        for letter, size in zip(term, shape):
            known = sizes.get(letter, 1)
            if size != 1 and known != 1 and size != known:
                raise Unmodelled(f"einsum index '{letter}' has sizes {known} and {size}")
            sizes[letter] = max(known, size)
    return sizes


def einsum_work(equation: str, shapes: Sequence[Sequence[int]], params: Sequence[bool]) -> OpWork:
    """Work of an Einsum with static input ``shapes``; ``params`` marks initializer inputs."""
    inputs, output = parse_equation(equation, [len(s) for s in shapes])
    sizes = _index_sizes(inputs, shapes)
    missing = set(output) - set(sizes)
    if missing:
        raise Unmodelled(f"einsum output index {sorted(missing)} appears in no input")
    out_elements = prod(sizes[c] for c in output)
    if len(inputs) == 1:
        if set(inputs[0]) <= set(output) and len(set(inputs[0])) == len(inputs[0]):
            return movement(out_elements, note="einsum permutation")
        return arithmetic(prod(sizes.values()))  # one add per element of the loop nest
    if len(inputs) != 2:
        raise Unmodelled("einsum with three or more operands: the contraction order is "
                         "implementation-defined")
    return _contraction(inputs, output, sizes, params)


def _contraction(inputs: list[str], output: str, sizes: dict[str, int],
                 params: Sequence[bool]) -> OpWork:
    from gate.ops.matmul import orient_gemm  # local: matmul imports this module

    left, right = inputs
    if len(set(left)) != len(left) or len(set(right)) != len(right):
        raise Unmodelled("einsum diagonal (an index repeated in one operand) is not modelled")
    for letter in set(left) ^ set(right):
        if letter not in output:
            raise Unmodelled(f"einsum sums index '{letter}' of one operand only; not modelled")
    batch = [c for c in left if c in right and c in output]
    contracted = [c for c in left if c in right and c not in output]
    rows = [c for c in left if c not in right]
    cols = [c for c in right if c not in left]
    m, k, n, count = (prod(sizes[c] for c in group) for group in (rows, contracted, cols, batch))
    gemm = orient_gemm(m, k, n, count, bool(params[0]), bool(params[1]), fold_batch=not batch)
    return arithmetic(0, macs=gemm.macs, gemms=(gemm,))
