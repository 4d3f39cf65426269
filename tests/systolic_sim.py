"""A cycle-level systolic-array simulator: the test oracle for the cost model's cycle counts.

It steps registers PE by PE, cycle by cycle, with data tagged by the index it
belongs to, and stops when the last result has left the array (not after a
precomputed number of cycles). It also computes the numbers, so a test can
check the product against numpy: the cycle count is only trusted when the
dataflow really computed A @ W.

Conventions match ``gate.targets.dataflow`` (no overlap between tile passes):
- weight-stationary: a K x N weight tile is shifted in from the top, one row per
  cycle; inputs enter row i from the left skewed by i cycles; partial sums flow
  down and leave the bottom row.
- output-stationary: each PE owns one output; A enters from the left skewed by
  row, W from the top skewed by column; after the last MAC the results shift
  out of the bottom row, one row per cycle.
- packed (grouped) mappings: independent GEMMs of one shape share a pass
  block-diagonally, each on its own rows and columns; zero weights (or
  ignored PEs) fill the rest. Weight-stationary blocks are K x N and a
  group's M rows may be cut into chunks that run side by side on copies of
  its weights; output-stationary blocks are M x N. The packing rule is written
  here again, independently of ``gate.targets.dataflow``.
Slow on purpose (pure Python): use small GEMMs only.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

Slot = tuple[int, float] | None  # (index the value belongs to, value), or an empty register


def _grid(rows: int, cols: int) -> list[list[Slot]]:
    return [[None] * cols for _ in range(rows)]


@dataclass
class SimResult:
    cycles: int
    macs: int  # MACs the PEs actually performed on valid data
    product: list[list[float]]  # the M x N result the array computed

    def utilization(self, rows: int, cols: int) -> float:
        return self.macs / (rows * cols * self.cycles) if self.cycles else 0.0


def _chunks(total: int, size: int) -> list[tuple[int, int]]:
    return [(start, min(size, total - start)) for start in range(0, total, size)]


def simulate_weight_stationary(a: list[list[float]], w: list[list[float]], rows: int,
                               cols: int) -> SimResult:
    """A (M x K) @ W (K x N) on a rows x cols weight-stationary array."""
    m_dim, k_dim, n_dim = len(a), len(w), len(w[0])
    out = [[0.0] * n_dim for _ in range(m_dim)]
    cycles = macs = 0
    for k0, r in _chunks(k_dim, rows):
        for n0, c in _chunks(n_dim, cols):
            tile_cycles, tile_macs = _ws_tile(a, w, out, k0, r, n0, c)
            cycles += tile_cycles
            macs += tile_macs
    return SimResult(cycles, macs, out)


def _ws_tile(a: list[list[float]], w: list[list[float]], out: list[list[float]], k0: int,
             r: int, n0: int, c: int) -> tuple[int, int]:
    m_dim = len(a)
    # Preload: each cycle every row passes its weights down; row 0 takes the next row,
    # fed bottom row first so that after r cycles row i holds W[k0 + i].
    weights: list[list[float | None]] = [[None] * c for _ in range(r)]
    cycles = 0
    for t in range(r):
        fed: list[float | None] = [w[k0 + r - 1 - t][n0 + j] for j in range(c)]
        weights = [fed, *weights[:-1]]
        cycles += 1
    assert all(weights[i][j] == w[k0 + i][n0 + j] for i in range(r) for j in range(c))
    # Stream: registers hold (row index m, value); None is an empty slot.
    a_reg, p_reg = _grid(r, c), _grid(r, c)
    collected = macs = 0
    t = 0
    while collected < m_dim * c:
        def feed(i: int, t: int = t) -> Slot:
            m = t - i
            return (m, a[m][k0 + i]) if 0 <= m < m_dim else None

        new_a, new_p, stepped = _ws_step(a_reg, p_reg, weights, feed, lambda i, j, m: True)
        macs += stepped
        a_reg, p_reg = new_a, new_p
        t += 1
        for j in range(c):
            done = p_reg[r - 1][j]
            if done is not None:
                out[done[0]][n0 + j] += done[1]
                collected += 1
    return cycles + t, macs


def _ws_step(a_reg: list[list[Slot]], p_reg: list[list[Slot]],
             weights: Sequence[Sequence[float | None]], feed: Callable[[int], Slot],
             useful: Callable[[int, int, int], bool]) -> tuple[list[list[Slot]], list[list[Slot]], int]:
    """One clock of a weight-stationary array; ``feed(i)`` enters row i from the left.

    Returns the new input and partial-sum registers and the useful MACs performed.
    """
    r, c = len(weights), len(weights[0])
    new_a, new_p = _grid(r, c), _grid(r, c)
    macs = 0
    for i in range(r):
        for j in range(c):
            a_in = feed(i) if j == 0 else a_reg[i][j - 1]
            if a_in is None:
                continue
            p_in: Slot = (a_in[0], 0.0) if i == 0 else p_reg[i - 1][j]
            assert p_in is not None and p_in[0] == a_in[0], "skew broken"
            weight = weights[i][j]
            assert weight is not None
            new_a[i][j] = a_in
            new_p[i][j] = (a_in[0], p_in[1] + weight * a_in[1])
            macs += useful(i, j, a_in[0])
    return new_a, new_p, macs


def simulate_output_stationary(a: list[list[float]], w: list[list[float]], rows: int,
                               cols: int) -> SimResult:
    """A (M x K) @ W (K x N) on a rows x cols output-stationary array."""
    m_dim, n_dim = len(a), len(w[0])
    out = [[0.0] * n_dim for _ in range(m_dim)]
    cycles = macs = 0
    for m0, r in _chunks(m_dim, rows):
        for n0, c in _chunks(n_dim, cols):
            tile_cycles, tile_macs = _os_tile(a, w, out, m0, r, n0, c)
            cycles += tile_cycles
            macs += tile_macs
    return SimResult(cycles, macs, out)


def _os_tile(a: list[list[float]], w: list[list[float]], out: list[list[float]], m0: int,
             r: int, n0: int, c: int, useful: Callable[[int, int], bool] = lambda i, j: True
             ) -> tuple[int, int]:
    k_dim = len(w)
    acc = [[0.0] * c for _ in range(r)]
    done = [[0] * c for _ in range(r)]
    a_reg, w_reg = _grid(r, c), _grid(r, c)
    macs = t = 0
    while any(done[i][j] < k_dim for i in range(r) for j in range(c)):
        new_a, new_w = _grid(r, c), _grid(r, c)
        for i in range(r):
            for j in range(c):
                if j == 0:
                    k = t - i
                    a_in: Slot = (k, a[m0 + i][k]) if 0 <= k < k_dim else None
                else:
                    a_in = a_reg[i][j - 1]
                if i == 0:
                    k = t - j
                    w_in: Slot = (k, w[k][n0 + j]) if 0 <= k < k_dim else None
                else:
                    w_in = w_reg[i - 1][j]
                new_a[i][j], new_w[i][j] = a_in, w_in
                if a_in is None or w_in is None:
                    assert a_in is None and w_in is None, "operands out of step"
                    continue
                assert a_in[0] == w_in[0], "skew broken"
                acc[i][j] += a_in[1] * w_in[1]
                done[i][j] += 1
                macs += useful(i, j)
        a_reg, w_reg = new_a, new_w
        t += 1
    # Drain: the results shift down one row per cycle out of the bottom row.
    pending: list[list[float] | None] = [acc[i] for i in range(r)]
    row_of = list(range(r))
    for _ in range(r):
        out_row, out_vals = row_of[-1], pending[-1]
        assert out_vals is not None
        for j in range(c):
            out[m0 + out_row][n0 + j] = out_vals[j]
        pending = [None, *pending[:-1]]
        row_of = [-1] + row_of[:-1]
        t += 1
    return t, macs


# ------------------------------------------------------------------ packed (grouped) mappings

Matrix = list[list[float]]


def simulate_grouped(dataflow: str, a_groups: list[Matrix], w_groups: list[Matrix], rows: int,
                     cols: int) -> SimResult:
    """``g`` independent products A_i (M x K) @ W_i (K x N), packed as the cost model packs them.

    The product is the groups' outputs side by side (M x g.N), as a grouped conv lays
    out its output channels. Unpackable shapes run group after group, unpacked.
    """
    m_dim, k_dim, n_dim = len(a_groups[0]), len(w_groups[0]), len(w_groups[0][0])
    along_rows = k_dim if dataflow == "weight-stationary" else m_dim
    fit = min(rows // along_rows, cols // n_dim) if along_rows <= rows and n_dim <= cols else 0
    if fit < 2:
        return _one_group_at_a_time(dataflow, a_groups, w_groups, rows, cols)
    if dataflow == "weight-stationary":
        return _ws_packed(a_groups, w_groups, fit)
    return _os_packed(a_groups, w_groups, fit)


def _one_group_at_a_time(dataflow: str, a_groups: list[Matrix], w_groups: list[Matrix],
                         rows: int, cols: int) -> SimResult:
    simulate = simulate_weight_stationary if dataflow == "weight-stationary" else \
        simulate_output_stationary
    results = [simulate(a, w, rows, cols) for a, w in zip(a_groups, w_groups)]
    product = [[value for r in results for value in r.product[m]] for m in range(len(a_groups[0]))]
    return SimResult(sum(r.cycles for r in results), sum(r.macs for r in results), product)


@dataclass
class _Block:
    """One block of a packed pass: a group's weights and the input rows it streams."""

    group: int
    first_row: int  # where this chunk's rows start in the group's M rows
    a: Matrix
    w: Matrix


def _ws_blocks(a_groups: list[Matrix], w_groups: list[Matrix], fit: int) -> list[_Block]:
    """Each group whole, or (fewer groups than room) its rows cut into chunks on weight copies."""
    groups, m_dim = len(a_groups), len(a_groups[0])
    split = max(1, min(fit // groups, m_dim)) if groups < fit else 1
    blocks = []
    for group, (a, w) in enumerate(zip(a_groups, w_groups)):
        base, extra = divmod(m_dim, split)
        start = 0
        for chunk in range(split):
            size = base + (chunk < extra)
            blocks.append(_Block(group, start, a[start:start + size], w))
            start += size
    return blocks


def _ws_packed(a_groups: list[Matrix], w_groups: list[Matrix], fit: int) -> SimResult:
    m_dim, n_dim = len(a_groups[0]), len(w_groups[0][0])
    out = [[0.0] * (n_dim * len(a_groups)) for _ in range(m_dim)]
    blocks = _ws_blocks(a_groups, w_groups, fit)
    cycles = macs = 0
    for start in range(0, len(blocks), fit):
        # Shortest chunk first: the longest drains last, from the rightmost columns.
        chunk = sorted(blocks[start:start + fit], key=lambda block: len(block.a))
        pass_cycles, pass_macs = _ws_pass(chunk, out)
        cycles += pass_cycles
        macs += pass_macs
    return SimResult(cycles, macs, out)


def _ws_pass(blocks: list[_Block], out: Matrix) -> tuple[int, int]:
    """One block-diagonal weight-stationary pass: preload, then stream every block's rows."""
    k_dim, n_dim = len(blocks[0].w), len(blocks[0].w[0])
    r, c = k_dim * len(blocks), n_dim * len(blocks)
    weights = [[blocks[i // k_dim].w[i % k_dim][j % n_dim] if i // k_dim == j // n_dim else 0.0
                for j in range(c)] for i in range(r)]
    longest = max(len(block.a) for block in blocks)
    wanted = sum(len(block.a) for block in blocks) * n_dim
    a_reg, p_reg = _grid(r, c), _grid(r, c)
    collected = macs = t = 0
    while collected < wanted:
        def feed(i: int, t: int = t) -> Slot:
            m, chunk = t - i, blocks[i // k_dim].a
            # Rows past a shorter chunk's end carry zeros: the skew stays intact.
            value = chunk[m][i % k_dim] if 0 <= m < len(chunk) else 0.0
            return (m, value) if 0 <= m < longest else None

        def useful(i: int, j: int, m: int) -> bool:
            return i // k_dim == j // n_dim and m < len(blocks[i // k_dim].a)

        new_a, new_p, stepped = _ws_step(a_reg, p_reg, weights, feed, useful)
        macs += stepped
        a_reg, p_reg = new_a, new_p
        t += 1
        for j in range(c):
            done, block = p_reg[r - 1][j], blocks[j // n_dim]
            if done is not None and done[0] < len(block.a):
                out[block.first_row + done[0]][block.group * n_dim + j % n_dim] += done[1]
                collected += 1
    return r + t, macs


def _os_packed(a_groups: list[Matrix], w_groups: list[Matrix], fit: int) -> SimResult:
    m_dim, n_dim = len(a_groups[0]), len(w_groups[0][0])
    out = [[0.0] * (n_dim * len(a_groups)) for _ in range(m_dim)]
    cycles = macs = 0
    for start in range(0, len(a_groups), fit):
        members = list(range(start, min(start + fit, len(a_groups))))
        # Rows of block b carry A_b, columns of block b carry W_b; off-diagonal PEs idle.
        a = [row for g in members for row in a_groups[g]]
        w = [[w_groups[g][k][j] for g in members for j in range(n_dim)]
             for k in range(len(w_groups[0]))]
        tile_out = [[0.0] * len(w[0]) for _ in range(len(a))]
        pass_cycles, pass_macs = _os_tile(a, w, tile_out, 0, len(a), 0, len(w[0]),
                                          lambda i, j: i // m_dim == j // n_dim)
        for b, g in enumerate(members):
            for m in range(m_dim):
                out[m][g * n_dim:(g + 1) * n_dim] = tile_out[b * m_dim + m][b * n_dim:(b + 1) * n_dim]
        cycles += pass_cycles
        macs += pass_macs
    return SimResult(cycles, macs, out)
