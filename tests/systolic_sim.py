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
Slow on purpose (pure Python): use small GEMMs only.
"""

from __future__ import annotations

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
        new_a, new_p = _grid(r, c), _grid(r, c)
        for i in range(r):
            for j in range(c):
                if j == 0:
                    m = t - i
                    a_in: Slot = (m, a[m][k0 + i]) if 0 <= m < m_dim else None
                else:
                    a_in = a_reg[i][j - 1]
                if a_in is None:
                    continue
                p_in: Slot = (a_in[0], 0.0) if i == 0 else p_reg[i - 1][j]
                assert p_in is not None and p_in[0] == a_in[0], "skew broken"
                weight = weights[i][j]
                assert weight is not None
                new_a[i][j] = a_in
                new_p[i][j] = (a_in[0], p_in[1] + weight * a_in[1])
                macs += 1
        a_reg, p_reg = new_a, new_p
        t += 1
        for j in range(c):
            done = p_reg[r - 1][j]
            if done is not None:
                out[done[0]][n0 + j] += done[1]
                collected += 1
    return cycles + t, macs


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
             r: int, n0: int, c: int) -> tuple[int, int]:
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
                macs += 1
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
