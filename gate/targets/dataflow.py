"""Closed-form mapping of one GEMM onto a PE array, per dataflow.

For an R x C array and a GEMM (M x K) @ (K x N), each function returns the
cycles at one MAC per PE per cycle and the operand traffic between the on-chip
buffers and the array, in elements. The systolic formulas are exactly what the
cycle-level simulator in ``tests/systolic_sim.py`` counts (the tests hold the
two equal); docs/costmodel.md derives each one.

Tile passes never overlap (no double-buffered weight preload, no drain/fill
overlap): a deliberately simple, stated model that over-counts fill and drain
slightly for arrays that do overlap them.

Small GEMMs are packed block-diagonally: when one GEMM's operand tile leaves
most of the array idle (a depthwise or grouped conv's groups, a stem conv with
few input channels), several independent GEMMs share one pass, each on its own
rows and columns (``_packing``). The cycle-level simulator realises the same
packing and the tests hold the two equal.
"""

from __future__ import annotations

from dataclasses import dataclass
from math import ceil, log2

from gate.ops.registry import GemmShape


@dataclass(frozen=True, slots=True)
class GemmMapping:
    """One ``GemmShape`` (all its ``count`` instances) mapped onto an array."""

    cycles: int  # at one MAC per PE per cycle
    macs: int  # useful MACs
    weight_reads: int  # elements of the K x N operand read from the buffer (per dataflow reuse)
    input_reads: int  # elements of the M x K operand read from the buffer
    output_accesses: int  # elements of the M x N result written (and partial sums read back)
    noc_hops: int  # element moves over PE-to-PE links
    weight_fetches: int  # K x N elements fetched from DRAM when the parameters do not fit


def map_gemm(gemm: GemmShape, rows: int, cols: int, dataflow: str) -> GemmMapping:
    """Cycles and operand traffic of ``gemm`` on a ``rows`` x ``cols`` array of ``dataflow``."""
    if gemm.macs <= 0:
        return GemmMapping(0, 0, 0, 0, 0, 0, 0)
    mapper = _MAPPERS[dataflow]
    return mapper(gemm, rows, cols)


@dataclass(frozen=True, slots=True)
class Packing:
    """How the ``count`` GEMMs of one shape share the array block-diagonally.

    ``blocks`` GEMMs (or row chunks of one GEMM) run side by side in one pass,
    each on its own rows and columns; ``row_split`` > 1 cuts each GEMM's M rows
    into that many chunks that run side by side (weight-stationary only: the
    weight tile is copied into each block). ``passes`` passes run one after another.
    """

    blocks: int
    row_split: int
    passes: int


def packing(gemm: GemmShape, rows: int, cols: int, dataflow: str) -> Packing | None:
    """The block-diagonal packing of ``gemm`` on the array, or None when it runs unpacked.

    Packs only independent GEMMs (``sequential`` = 1) whose tile fits the array at
    least twice: K x N blocks on a weight-stationary array, M x N blocks on an
    output-stationary one. A weight-stationary array with more room than groups
    also splits M across copies of the weight tile (small GEMMs tiled side by side).
    """
    if gemm.sequential > 1 or dataflow not in ("weight-stationary", "output-stationary"):
        return None
    along_rows = gemm.k if dataflow == "weight-stationary" else gemm.m
    if along_rows > rows or gemm.n > cols:
        return None
    fit = min(rows // along_rows, cols // gemm.n)
    if fit < 2:
        return None
    split = 1
    if dataflow == "weight-stationary" and gemm.count < fit:
        split = max(1, min(fit // gemm.count, gemm.m))
    units = gemm.count * split
    blocks = min(fit, units)
    return Packing(blocks=blocks, row_split=split, passes=ceil(units / blocks))


def _packed_weight_stationary(g: GemmShape, pack: Packing) -> GemmMapping:
    # A pass of b blocks is one r x c = (b.K) x (b.N) tile: r preload cycles, then
    # the longest row chunk L streams through in L + r + c - 2. Summed over passes
    # (the blocks sum to count x split): 2.K.units + N.units + passes.(L - 2).
    units = g.count * pack.row_split
    chunk_rows = ceil(g.m / pack.row_split)
    return GemmMapping(
        cycles=2 * g.k * units + g.n * units + pack.passes * (chunk_rows - 2),
        macs=g.macs,
        weight_reads=units * g.k * g.n,  # each block loads its own copy of its weights
        input_reads=g.count * g.m * g.k,  # each input row enters once
        output_accesses=g.count * g.m * g.n,  # one K tile: each output written once
        noc_hops=2 * g.macs,
        weight_fetches=g.count * g.k * g.n,  # copies are made on chip
    )


def _packed_output_stationary(g: GemmShape, pack: Packing) -> GemmMapping:
    # A pass of b blocks is one r x c = (b.M) x (b.N) tile: K + r + c - 2 + r cycles.
    # Summed over passes: passes.(K - 2) + 2.M.count + N.count.
    return GemmMapping(
        cycles=pack.passes * (g.k - 2) + 2 * g.m * g.count + g.n * g.count,
        macs=g.macs,
        weight_reads=g.count * g.k * g.n,
        input_reads=g.count * g.m * g.k,
        output_accesses=g.count * g.m * g.n,
        noc_hops=2 * g.macs,
        weight_fetches=g.count * g.k * g.n,
    )


def _weight_stationary(g: GemmShape, rows: int, cols: int) -> GemmMapping:
    # K along rows, N along columns; each K x N tile is preloaded (one row per cycle),
    # then all M rows stream through skewed: a tile of r x c takes r + (M + r + c - 2).
    # Summed over the tk x tn tiles (sum of r = K, sum of c = N):
    pack = packing(g, rows, cols, "weight-stationary")
    if pack is not None:
        return _packed_weight_stationary(g, pack)
    tk, tn = ceil(g.k / rows), ceil(g.n / cols)
    per_gemm = tk * tn * (g.m - 2) + 2 * g.k * tn + g.n * tk
    return GemmMapping(
        cycles=g.count * per_gemm,
        macs=g.macs,
        weight_reads=g.count * g.k * g.n,  # each weight loaded once, reused by all M rows
        input_reads=g.count * g.m * g.k * tn,  # inputs re-read for every column tile
        output_accesses=g.count * g.m * g.n * (2 * tk - 1),  # partial sums written/read per K tile
        noc_hops=2 * g.macs,  # per MAC: the input arrives from the left, the partial sum from above
        weight_fetches=g.count * g.k * g.n,
    )


def _output_stationary(g: GemmShape, rows: int, cols: int) -> GemmMapping:
    # M along rows, N along columns; each PE keeps one output. A and W stream in
    # skewed over K, then outputs shift out one row per cycle: r x c takes K + r + c - 2 + r.
    pack = packing(g, rows, cols, "output-stationary")
    if pack is not None:
        return _packed_output_stationary(g, pack)
    tm, tn = ceil(g.m / rows), ceil(g.n / cols)
    per_gemm = tm * tn * (g.k - 2) + 2 * g.m * tn + g.n * tm
    return GemmMapping(
        cycles=g.count * per_gemm,
        macs=g.macs,
        weight_reads=g.count * g.k * g.n * tm,  # weights re-streamed for every row tile
        input_reads=g.count * g.m * g.k * tn,  # inputs re-streamed for every column tile
        output_accesses=g.count * g.m * g.n,  # each output written once
        noc_hops=2 * g.macs,  # per MAC: input from the left, weight from above
        weight_fetches=g.count * g.k * g.n * tm,
    )


def _matrix_vector(g: GemmShape, rows: int, cols: int) -> GemmMapping:
    # Each cycle one R-slice of an input row meets an R x C block of weights; an
    # adder tree of depth ceil(log2 R) + 1 reduces it. No weight reuse across rows.
    tk, tn = ceil(g.k / rows), ceil(g.n / cols)
    depth = _tree_depth(rows)
    return GemmMapping(
        cycles=g.count * (g.m * tk * tn + depth),
        macs=g.macs,
        weight_reads=g.count * g.m * g.k * g.n,  # the whole block is read again for every row
        input_reads=g.count * g.m * g.k * tn,
        output_accesses=g.count * g.m * g.n,
        noc_hops=2 * g.macs,  # per MAC: input broadcast to the column, product into the tree
        weight_fetches=g.count * g.m * g.k * g.n,  # streamed from memory for every row
    )


def _vector(g: GemmShape, rows: int, cols: int) -> GemmMapping:
    # rows x cols SIMD lanes, each accumulating one output over K. Independent outputs
    # (M x N, and the independent GEMMs of one step) fill the lanes; the ``sequential``
    # steps of a recurrence run one after another.
    lanes = rows * cols
    steps = max(1, g.sequential)
    parallel = ceil(g.count / steps)
    cycles = steps * ceil(parallel * g.m * g.n / lanes) * g.k
    return GemmMapping(
        cycles=cycles,
        macs=g.macs,
        weight_reads=g.macs,  # both operands read for every MAC: no reuse beyond the accumulator
        input_reads=g.macs,
        output_accesses=g.count * g.m * g.n,
        noc_hops=0,  # lane-local: operands come straight from the register file
        weight_fetches=g.count * g.k * g.n,  # a tiled kernel loops all rows over each weight block
    )


def _tree_depth(rows: int) -> int:
    return ceil(log2(rows)) + 1 if rows > 1 else 1


_MAPPERS = {
    "weight-stationary": _weight_stationary,
    "output-stationary": _output_stationary,
    "matrix-vector": _matrix_vector,
    "vector": _vector,
}
