"""The target profile: what the cost model knows of an accelerator (loaded from YAML).

The cost-model work owns this module; the fields below are the minimum other
modules rely on (records, reports): keep them, add what the cost model needs.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True, slots=True)
class TargetProfile:
    name: str
    description: str
    source: str  # "builtin" or the file path it was loaded from
    clock_hz: float
    pe_rows: int
    pe_cols: int
    dataflow: str  # "weight-stationary", "output-stationary", "matrix-vector", "vector"
    param_buffer_bytes: int  # 0 when the buffer is unified
    activation_buffer_bytes: int  # 0 when the buffer is unified
    unified_buffer_bytes: int  # 0 when buffers are separate
    dram_bytes_per_s: float

    @property
    def pe_count(self) -> int:
        return self.pe_rows * self.pe_cols

    def peak_flops_per_s(self, precision: str) -> float:
        raise NotImplementedError
