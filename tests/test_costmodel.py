"""Tests for the accelerator cost model (gate.costmodel, gate.targets.dataflow).

External checks: cycle counts against a cycle-level systolic simulator
(tests/systolic_sim.py) that also multiplies the matrices (numpy checks the
product); the roofline formula and ridge point against Williams, Waterman &
Patterson, CACM 2009; energy arithmetic with per-operation energies of the
45 nm table in Horowitz, ISSCC 2014 (values quoted from memory), hand-computed.
"""

from __future__ import annotations

import dataclasses
from dataclasses import replace
from math import ceil
from types import MappingProxyType

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from gate.costmodel import EnergyBreakdown, conv_kind, cost_model
from gate.errors import InputError
from gate.model.graph import Graph, LoadedModel
from gate.ops.registry import GemmShape, OpWork
from gate.profile import Coverage, LayerProfile, ModelProfile, UnmodelledOp
from gate.targets.dataflow import Packing, map_gemm, packing
from gate.targets.spec import EngineSpec, PrecisionSpec, TargetProfile
from tests.systolic_sim import (
    simulate_grouped,
    simulate_output_stationary,
    simulate_weight_stationary,
)

PJ = 1e-12

# Horowitz, ISSCC 2014, energy table at 45 nm (from memory): 8-bit int multiply 0.2 pJ,
# 8-bit int add 0.03 pJ; 32-bit float multiply 3.7 pJ, add 0.9 pJ; 64-bit read of an
# 8 KB SRAM 10 pJ; 64-bit DRAM access 1.3-2.6 nJ (we take 2.6 nJ).
HOROWITZ_INT8_MAC_J = (0.2 + 0.03) * PJ
HOROWITZ_FP32_MAC_J = (3.7 + 0.9) * PJ
HOROWITZ_SRAM_8KB_J_PER_BYTE = 10 * PJ / 8
HOROWITZ_DRAM_J_PER_BYTE = 2600 * PJ / 8


def make_target(dataflow: str = "weight-stationary", rows: int = 4, cols: int = 4, *,
                clock_hz: float = 1e9, param_bytes: int = 1 << 20, act_bytes: int = 1 << 20,
                unified_bytes: int = 0, dram_bytes_per_s: float = 1e10, **changes: object
                ) -> TargetProfile:
    """A small test target at one MAC per PE per cycle, no overheads unless asked."""
    target = TargetProfile(
        name="test-array", description="test", source="builtin", clock_hz=clock_hz,
        pe_rows=rows, pe_cols=cols, dataflow=dataflow,
        param_buffer_bytes=0 if unified_bytes else param_bytes,
        activation_buffer_bytes=0 if unified_bytes else act_bytes,
        unified_buffer_bytes=unified_bytes, dram_bytes_per_s=dram_bytes_per_s,
        precisions=MappingProxyType({
            "int8": PrecisionSpec(1.0, HOROWITZ_INT8_MAC_J),
            "fp32": PrecisionSpec(1.0, HOROWITZ_FP32_MAC_J),
        }),
        buffer_energy_j_per_byte=HOROWITZ_SRAM_8KB_J_PER_BYTE,
        noc_energy_j_per_byte=0.0, dram_energy_j_per_byte=HOROWITZ_DRAM_J_PER_BYTE,
        vector=EngineSpec(ops_per_cycle=8, clock_hz=clock_hz, op_energy_j=0.1 * PJ, overhead_s=0),
        host=EngineSpec(ops_per_cycle=1, clock_hz=clock_hz, op_energy_j=10 * PJ, overhead_s=0),
    )
    return replace(target, **changes)  # type: ignore[arg-type]


def gemm_layer(gemms: tuple[GemmShape, ...], *, index: int = 0, name: str = "layer",
               op_type: str = "MatMul", dtype: str = "INT8", param_count: int | None = None,
               input_bytes: int | None = None, output_bytes: int | None = None,
               vector_ops: int = 0) -> LayerProfile:
    """A layer whose work is ``gemms``; bytes default to one byte per element (int8)."""
    macs = sum(g.macs for g in gemms)
    if param_count is None:
        param_count = sum(g.k * g.n * g.count for g in gemms if g.weights_are_params)
    size = 1 if dtype == "INT8" else 4
    ins = sum(g.m * g.k * g.count for g in gemms) * size if input_bytes is None else input_bytes
    outs = sum(g.m * g.n * g.count for g in gemms) * size if output_bytes is None else output_bytes
    work = OpWork(macs=macs, flops=2 * macs + vector_ops, gemms=gemms, vector_ops=vector_ops)
    return LayerProfile(
        index=index, name=name, op_type=op_type, domain="", input_shapes=(), input_dtypes=(dtype,),
        output_shapes=(), output_dtypes=(dtype,), param_names=(), param_count=param_count,
        param_bytes=param_count * size, input_bytes=ins, output_bytes=outs, macs=macs,
        flops=work.flops, modelled=True, unmodelled_reason="", work=work)


def other_layer(op_type: str, *, index: int = 0, vector_ops: int = 0, is_view: bool = False,
                modelled: bool = True, nbytes: int = 64) -> LayerProfile:
    work = OpWork(flops=vector_ops, vector_ops=vector_ops, is_view=is_view) if modelled else None
    return LayerProfile(
        index=index, name=f"{op_type.lower()}{index}", op_type=op_type, domain="",
        input_shapes=(), input_dtypes=("INT8",), output_shapes=(), output_dtypes=("INT8",),
        param_names=(), param_count=0, param_bytes=0, input_bytes=nbytes, output_bytes=nbytes,
        macs=0 if modelled else None, flops=vector_ops if modelled else None, modelled=modelled,
        unmodelled_reason="" if modelled else "no cost function", work=work)


def make_profile(*layers: LayerProfile, precision: str = "native") -> ModelProfile:
    layers = tuple(replace(layer, index=i) for i, layer in enumerate(layers))
    model = LoadedModel(path="test.onnx", name="test", graph=Graph((), {}, (), ()), opsets={},
                        ir_version=8, producer="test", dim_bindings={}, unbound_dims=())
    unmodelled = [layer for layer in layers if not layer.modelled]
    coverage = Coverage(
        nodes_total=len(layers), nodes_modelled=len(layers) - len(unmodelled),
        work_modelled=sum(layer.counted_macs for layer in layers), work_unmodelled_estimate=0,
        unmodelled=tuple(UnmodelledOp(u.op_type, "", 1, u.unmodelled_reason) for u in unmodelled))
    return ModelProfile(
        model=model, precision=precision, layers=layers, coverage=coverage,
        total_macs=sum(layer.counted_macs for layer in layers),
        total_flops=sum(layer.flops or 0 for layer in layers),
        total_param_count=sum(layer.param_count for layer in layers),
        total_param_bytes=sum(layer.param_bytes for layer in layers))


# ------------------------------------------------------------------ cycle oracle

SIMULATORS = {
    "weight-stationary": simulate_weight_stationary,
    "output-stationary": simulate_output_stationary,
}
small = st.integers(min_value=1, max_value=9)


@settings(max_examples=40, deadline=None)
@given(m=small, k=small, n=small, rows=st.integers(1, 6), cols=st.integers(1, 6),
       dataflow=st.sampled_from(sorted(SIMULATORS)), seed=st.integers(0, 2**16))
def test_cycles_and_utilization_equal_the_cycle_level_simulator(m: int, k: int, n: int, rows: int,
                                                                cols: int, dataflow: str,
                                                                seed: int) -> None:
    rng = np.random.default_rng(seed)
    a, w = rng.integers(-8, 8, (m, k)), rng.integers(-8, 8, (k, n))
    # One GEMM: unpacked, or (small enough to fit twice) its rows split over weight copies.
    sim = simulate_grouped(dataflow, [a.tolist()], [w.tolist()], rows, cols)
    np.testing.assert_array_equal(np.array(sim.product), a @ w)  # numpy: the array computed A @ W
    assert sim.macs == m * k * n
    target = make_target(dataflow, rows, cols)
    cost = cost_model(make_profile(gemm_layer((GemmShape(m, k, n),))), target)
    layer = cost.layers[0]
    assert layer.cycles == sim.cycles
    assert layer.utilization == pytest.approx(sim.utilization(rows, cols), rel=1e-12)
    assert cost.utilization == pytest.approx(sim.utilization(rows, cols), rel=1e-12)


@settings(max_examples=60, deadline=None)
@given(groups=st.integers(1, 7), m=st.integers(1, 7), k=st.integers(1, 5), n=st.integers(1, 4),
       rows=st.integers(1, 12), cols=st.integers(1, 12),
       dataflow=st.sampled_from(sorted(SIMULATORS)), seed=st.integers(0, 2**16))
def test_grouped_and_packed_cycles_equal_the_cycle_level_simulator(
        groups: int, m: int, k: int, n: int, rows: int, cols: int, dataflow: str,
        seed: int) -> None:
    # Grouped conv = ``groups`` independent GEMMs; the simulator packs them block-diagonally
    # (or cuts M into chunks on weight copies) by its own rule and really multiplies.
    rng = np.random.default_rng(seed)
    a = rng.integers(-8, 8, (groups, m, k))
    w = rng.integers(-8, 8, (groups, k, n))
    sim = simulate_grouped(dataflow, a.tolist(), w.tolist(), rows, cols)
    expected = np.concatenate([a[g] @ w[g] for g in range(groups)], axis=1)
    np.testing.assert_array_equal(np.array(sim.product), expected)  # numpy: every group's product
    assert sim.macs == groups * m * k * n
    gemm = GemmShape(m, k, n, count=groups)
    assert map_gemm(gemm, rows, cols, dataflow).cycles == sim.cycles
    layer = cost_model(make_profile(gemm_layer((gemm,))), make_target(dataflow, rows, cols)).layers[0]
    assert layer.utilization == pytest.approx(sim.utilization(rows, cols), rel=1e-12)


@pytest.mark.parametrize("dataflow", sorted(SIMULATORS))
def test_groups_too_large_to_pack_run_one_after_another(dataflow: str) -> None:
    # A 3 x 2 tile fits a 4 x 4 array only once: no packing, six passes of one group each.
    a, w = np.ones((5, 3)), np.ones((3, 2))
    one = SIMULATORS[dataflow](a.tolist(), w.tolist(), 4, 4).cycles
    assert packing(GemmShape(5, 3, 2, count=6), 4, 4, dataflow) is None
    assert map_gemm(GemmShape(5, 3, 2, count=6), 4, 4, dataflow).cycles == 6 * one


def test_packing_shares_the_array_between_groups_and_splits_rows_of_a_small_gemm() -> None:
    # 3x3 depthwise (K = 9, N = 1) on 64 x 64: seven channels per weight-stationary pass.
    assert packing(GemmShape(3136, 9, 1, count=128), 64, 64, "weight-stationary") == \
        Packing(blocks=7, row_split=1, passes=19)
    # A stem conv (K = 27, N = 32) fits twice: its rows run on two copies of its weights.
    assert packing(GemmShape(12544, 27, 32), 64, 64, "weight-stationary") == \
        Packing(blocks=2, row_split=2, passes=1)
    # Output-stationary packs M x N blocks: a depthwise layer's M (pixels) is too tall to.
    assert packing(GemmShape(3136, 9, 1, count=128), 16, 16, "output-stationary") is None
    assert packing(GemmShape(4, 9, 2, count=10), 16, 16, "output-stationary") == \
        Packing(blocks=4, row_split=1, passes=3)
    # Matrix-vector and vector arrays do not pack (the vector lanes already fill from groups).
    assert packing(GemmShape(3136, 9, 1, count=128), 8, 8, "matrix-vector") is None
    # A recurrence's steps depend on each other: never packed.
    assert packing(GemmShape(1, 8, 8, count=10, sequential=10), 64, 64, "weight-stationary") is None


def test_half_rate_precision_doubles_the_cycles() -> None:
    target = make_target(precisions=MappingProxyType({"fp16": PrecisionSpec(0.5, PJ)}))
    layer = gemm_layer((GemmShape(16, 8, 8),), dtype="FLOAT16")
    full = map_gemm(GemmShape(16, 8, 8), 4, 4, "weight-stationary").cycles
    cost = cost_model(make_profile(layer), target).layers[0]
    assert cost.cycles == 2 * full
    # utilization is measured against the array's peak at that precision
    assert cost.utilization == pytest.approx(16 * 8 * 8 / (16 * 0.5 * 2 * full))


# ------------------------------------------------------------------ roofline

def test_latency_follows_the_roofline_and_ridge_point() -> None:
    # Williams, Waterman & Patterson, CACM 2009: attainable FLOP/s =
    # min(peak FLOP/s, arithmetic intensity x peak bandwidth); ridge = peak / bandwidth.
    # A vector array with M x N a multiple of its lanes runs at exactly 100 % utilization,
    # so its compute time is FLOP / peak and the model must land on the roof.
    target = make_target("vector", 1, 16, clock_hz=1e9, dram_bytes_per_s=4e9)
    peak = 2 * 16 * 1e9
    assert target.peak_flops_per_s("int8") == peak
    assert target.ridge_flop_per_byte("int8") == pytest.approx(peak / 4e9)
    for m in (1, 2, 4, 16, 64, 256):  # intensities on both sides of the ridge (8 FLOP/byte)
        gemm = GemmShape(m, 64, 16)
        layer = gemm_layer((gemm,))  # parameters fit: fetched once; intensity = 2 M
        cost = cost_model(make_profile(layer), target).layers[0]
        dram_bytes = cost.param_dram_bytes + cost.act_dram_bytes
        intensity = layer.flops / dram_bytes
        attainable = min(peak, intensity * 4e9)
        assert layer.flops / cost.latency_s == pytest.approx(attainable, rel=1e-9)
        assert cost.bound == ("memory" if intensity < peak / 4e9 else "compute")


def test_overhead_adds_to_the_roofline_time_and_can_bound_a_layer() -> None:
    target = make_target(layer_overhead_s=1e-3)
    cost = cost_model(make_profile(gemm_layer((GemmShape(4, 4, 4),))), target).layers[0]
    assert cost.latency_s == pytest.approx(max(cost.compute_s, cost.memory_s) + 1e-3)
    assert cost.bound == "overhead"


# ------------------------------------------------------------------ energy

def test_energy_with_published_per_operation_energies_matches_hand_computation() -> None:
    # One int8 GEMM (M=8, K=4, N=4) on a 4x4 weight-stationary array: one tile.
    # Hand count: MACs 128; buffer: weights 16 + inputs 8*4*1 + outputs 8*4*(2*1-1) = 80 B,
    # plus the 16 parameter bytes fetched from DRAM into the buffer = 96 B; DRAM: the 16
    # parameter bytes once (they fit), no spill. Static power 0.5 W over the latency.
    target = make_target(static_power_w=0.5)
    layer = gemm_layer((GemmShape(8, 4, 4),))
    cost = cost_model(make_profile(layer), target).layers[0]
    assert cost.param_dram_bytes == 16 and cost.act_dram_bytes == 0
    assert cost.buffer_bytes == 96
    assert cost.cycles == 4 + (8 + 4 + 4 - 2)  # preload 4 rows, then M + r + c - 2
    assert cost.energy.mac_j == pytest.approx(128 * 0.23 * PJ)
    assert cost.energy.buffer_j == pytest.approx(96 * 1.25 * PJ)
    assert cost.energy.dram_param_j == pytest.approx(16 * 325 * PJ)
    assert cost.energy.dram_act_j == 0.0
    assert cost.energy.static_j == pytest.approx(0.5 * 18e-9)
    parts = sum(cost.energy.as_dict().values())
    assert cost.energy.total_j == pytest.approx(parts)
    assert cost.energy.total_j == pytest.approx(
        (128 * 0.23 + 96 * 1.25 + 16 * 325) * PJ + 0.5 * 18e-9)


def test_fp32_layer_uses_the_fp32_mac_energy() -> None:
    layer = gemm_layer((GemmShape(8, 4, 4),), dtype="FLOAT")
    cost = cost_model(make_profile(layer), make_target()).layers[0]
    assert cost.precision == "fp32"
    assert cost.energy.mac_j == pytest.approx(128 * 4.6 * PJ)  # Horowitz: 3.7 + 0.9 pJ
    assert cost.param_dram_bytes == 64


def test_model_totals_are_sums_of_layers_and_parts_sum_to_total() -> None:
    profile = make_profile(gemm_layer((GemmShape(64, 32, 16),)), other_layer("Relu", vector_ops=999),
                           gemm_layer((GemmShape(1, 64, 64),)))
    cost = cost_model(profile, make_target(static_power_w=0.1, noc_energy_j_per_byte=0.02 * PJ))
    assert cost.latency_s == pytest.approx(sum(layer.latency_s for layer in cost.layers))
    assert cost.energy == sum(layer.energy for layer in cost.layers)
    assert cost.energy.total_j == pytest.approx(sum(cost.energy.as_dict().values()))
    assert cost.param_dram_bytes == sum(layer.param_dram_bytes for layer in cost.layers)
    assert cost.inferences_per_s == pytest.approx(1 / cost.latency_s)
    assert sum([EnergyBreakdown(mac_j=1.0), EnergyBreakdown(static_j=2.0)]).total_j == 3.0


def test_energy_parts_are_every_field() -> None:
    """as_dict and + spell the fields out (speed); a field added later must be in both."""
    names = [f.name for f in dataclasses.fields(EnergyBreakdown)]
    parts = EnergyBreakdown(*(float(2 ** i) for i in range(len(names))))
    assert list(parts.as_dict()) == names
    assert (parts + parts).as_dict() == {name: 2 * value for name, value in parts.as_dict().items()}


def test_peak_flops_per_joule_pays_mac_energy_and_static_power() -> None:
    target = make_target(static_power_w=0.0)
    assert target.peak_flops_per_j("int8") == pytest.approx(2 / HOROWITZ_INT8_MAC_J)
    with_static = make_target(static_power_w=1.0)
    flops = with_static.peak_flops_per_s("int8")
    assert with_static.peak_flops_per_j("int8") == pytest.approx(
        flops / (flops / 2 * HOROWITZ_INT8_MAC_J + 1.0))


# ------------------------------------------------------------------ memory traffic

def test_parameters_that_do_not_fit_are_refetched_every_recurrent_step() -> None:
    # An LSTM-like layer: the same K x N recurrent weights used in 10 chained steps.
    steps, k, n = 10, 32, 128
    gemm = GemmShape(1, k, n, count=steps, sequential=steps)
    layer = gemm_layer((gemm,), param_count=k * n, op_type="LSTM")
    fits = cost_model(make_profile(layer), make_target(param_bytes=k * n)).layers[0]
    assert fits.params_fit and fits.param_dram_bytes == k * n  # once per inference
    spills = cost_model(make_profile(layer), make_target(param_bytes=k * n - 1)).layers[0]
    assert not spills.params_fit and spills.param_dram_bytes == steps * k * n
    assert spills.memory_s == pytest.approx(steps * k * n / 1e10)


def test_output_stationary_refetches_weights_per_row_tile_when_they_do_not_fit() -> None:
    gemm = GemmShape(m=10, k=8, n=4)  # 3 row tiles of a 4-row array
    layer = gemm_layer((gemm,))
    target = make_target("output-stationary", param_bytes=8)
    assert cost_model(make_profile(layer), target).layers[0].param_dram_bytes == 3 * 8 * 4
    ws = make_target("weight-stationary", param_bytes=8)  # WS streams all rows past each tile
    assert cost_model(make_profile(layer), ws).layers[0].param_dram_bytes == 8 * 4
    mv = make_target("matrix-vector", param_bytes=8)  # weights streamed again for every row
    assert cost_model(make_profile(layer), mv).layers[0].param_dram_bytes == 10 * 8 * 4
    vec = make_target("vector", 1, 16, param_bytes=8)  # a tiled kernel reuses each weight block
    assert cost_model(make_profile(layer), vec).layers[0].param_dram_bytes == 8 * 4


def test_activations_spill_when_they_do_not_fit() -> None:
    layer = gemm_layer((GemmShape(100, 8, 8),))  # 800 B in, 800 B out
    kept = cost_model(make_profile(layer), make_target(act_bytes=1600)).layers[0]
    assert kept.activations_fit and kept.act_dram_bytes == 0
    spilled = cost_model(make_profile(layer), make_target(act_bytes=1599)).layers[0]
    assert not spilled.activations_fit and spilled.act_dram_bytes == 1600
    assert spilled.energy.dram_act_j == pytest.approx(1600 * HOROWITZ_DRAM_J_PER_BYTE)


def test_unified_buffer_shares_room_between_parameters_and_activations() -> None:
    layer = gemm_layer((GemmShape(10, 10, 10),))  # 100 B params, 100 B in, 100 B out
    assert cost_model(make_profile(layer), make_target(unified_bytes=300)).layers[0].activations_fit
    tight = cost_model(make_profile(layer), make_target(unified_bytes=299)).layers[0]
    assert tight.params_fit and not tight.activations_fit


def test_whole_model_weight_residency_removes_parameter_traffic_when_everything_fits() -> None:
    profile = make_profile(gemm_layer((GemmShape(4, 16, 16),)), gemm_layer((GemmShape(4, 16, 16),)))
    resident = cost_model(profile, make_target(param_bytes=512, weights_resident=True))
    assert resident.weights_resident and resident.param_dram_bytes == 0
    assert all(layer.energy.dram_param_j == 0 for layer in resident.layers)
    too_big = cost_model(profile, make_target(param_bytes=511, weights_resident=True))
    assert not too_big.weights_resident and too_big.param_dram_bytes == 512
    assert any("do not fit" in note for note in too_big.notes)
    assert cost_model(profile, make_target(param_bytes=512)).param_dram_bytes == 512
    assert cost_model(profile, make_target(param_bytes=512), weights_resident=True).weights_resident


# ------------------------------------------------------------------ engines and coverage

def test_view_ops_are_free_and_unmodelled_layers_are_marked_not_free() -> None:
    profile = make_profile(other_layer("Reshape", is_view=True), other_layer("Mystery", modelled=False),
                           gemm_layer((GemmShape(4, 4, 4),)))
    cost = cost_model(profile, make_target())
    view, unknown, gemm = cost.layers
    assert (view.engine, view.latency_s, view.modelled) == ("none", 0.0, True)
    assert (unknown.engine, unknown.bound, unknown.modelled) == ("none", "none", False)
    # unknown is never zero: every time, traffic and energy figure of it is None
    assert (unknown.energy, unknown.latency_s, unknown.cycles, unknown.utilization,
            unknown.param_dram_bytes, unknown.act_dram_bytes) == (None,) * 6
    assert unknown.activations_fit is True  # its byte counts are known (64 B in, 64 B out)
    assert cost.latency_s == view.latency_s + gemm.latency_s  # the totals skip the unknown
    big_unknown = replace(other_layer("Mystery", modelled=False), param_bytes=2 << 20)
    assert not cost_model(make_profile(big_unknown), make_target()).layers[0].params_fit
    assert gemm.engine == "array"
    assert any("unmodelled" in note for note in cost.notes)


def test_non_gemm_work_runs_on_the_vector_unit_or_as_placed() -> None:
    relu = other_layer("Relu", vector_ops=800)
    vec = cost_model(make_profile(relu), make_target()).layers[0]
    assert vec.engine == "vector" and vec.cycles == 100  # 8 ops per cycle
    assert vec.energy.mac_j == pytest.approx(800 * 0.1 * PJ)
    hosted = cost_model(make_profile(relu), make_target(placement={"Relu": "host"})).layers[0]
    assert hosted.engine == "host" and hosted.cycles == 800
    assert hosted.act_dram_bytes == 128  # the host reads and writes through DRAM
    no_vector = cost_model(make_profile(relu), make_target(vector=None)).layers[0]
    assert no_vector.engine == "host"
    gemm_on_host = cost_model(make_profile(gemm_layer((GemmShape(4, 4, 4),), op_type="MatMul")),
                              make_target(placement={"MatMul": "host"})).layers[0]
    assert gemm_on_host.engine == "host" and gemm_on_host.cycles == 64


def test_fused_elementwise_work_overlaps_the_array() -> None:
    layer = gemm_layer((GemmShape(4, 4, 4),), vector_ops=8000)  # 1000 vector cycles > array cycles
    cost = cost_model(make_profile(layer), make_target()).layers[0]
    assert cost.compute_s == pytest.approx(1000 / 1e9)
    assert cost.cycles == map_gemm(GemmShape(4, 4, 4), 4, 4, "weight-stationary").cycles


# ------------------------------------------------------------------ precision

def test_explicit_precision_the_target_lacks_is_refused_naming_both() -> None:
    profile = make_profile(gemm_layer((GemmShape(4, 4, 4),)), precision="fp16")
    with pytest.raises(InputError, match=r"test-array.*fp16.*int8, fp32"):
        cost_model(profile, make_target())
    with pytest.raises(InputError, match="unknown precision"):
        cost_model(make_profile(gemm_layer((GemmShape(4, 4, 4),)), precision="fp12"), make_target())


def test_precision_follows_explicit_deploy_precision_then_layer_dtypes() -> None:
    float_layer = gemm_layer((GemmShape(4, 4, 4),), dtype="FLOAT")
    cost = cost_model(make_profile(float_layer, precision="int8"), make_target())
    assert cost.precision == "int8" and cost.layers[0].precision == "int8"
    mixed = make_profile(gemm_layer((GemmShape(64, 64, 64),), dtype="INT8"), float_layer)
    cost = cost_model(mixed, make_target())
    assert cost.precision == "int8"  # the precision carrying most MACs
    assert [layer.precision for layer in cost.layers] == ["int8", "fp32"]
    assert cost.peak_flops_per_s == make_target().peak_flops_per_s("int8")


# ------------------------------------------------------------------ facts of the trade

def test_depthwise_layer_uses_the_array_far_worse_than_a_standard_conv_of_equal_macs() -> None:
    # Common practice, no source: depthwise convolutions underfill a large systolic array,
    # even when a compiler packs channels side by side.
    # 3x3 depthwise over 64 channels at 28x28 (count = 64 GEMMs of 784 x 9 x 1) against a
    # standard conv with the same MACs (784 x 9 x 64).
    target = make_target("weight-stationary", 64, 64, param_bytes=4 << 20, act_bytes=2 << 20)
    depthwise = gemm_layer((GemmShape(784, 9, 1, count=64),), op_type="Conv")
    standard = gemm_layer((GemmShape(784, 9, 64),), op_type="Conv")
    assert depthwise.macs == standard.macs
    dw = cost_model(make_profile(depthwise), target).layers[0]
    std = cost_model(make_profile(standard), target).layers[0]
    assert dw.utilization < std.utilization / 5
    assert dw.latency_s > 5 * std.latency_s
    # Packing: seven channels share each pass (ceil(64 / 7) = 10 passes), against one pass
    # per channel unpacked: 64 x (M - 2 + 2K + N) cycles (docs/costmodel.md section 2).
    assert dw.cycles == 2 * 9 * 64 + 1 * 64 + 10 * (784 - 2)
    assert dw.cycles * 5 < 64 * (784 - 2 + 2 * 9 + 1)


# ------------------------------------------------------------------ facts of the trade, end to end

def _cost_of(proto: object, tmp_path_factory: pytest.TempPathFactory, dims: dict[str, int],
             target_name: str | None = None, precision: str = "int8",
             changes: dict[str, object] | None = None):
    """Profile and cost ``proto``; on the trade-sized test target (tests/tradekit.py)
    unless a built-in ``target_name`` is given."""
    from gate.model.loader import load_model
    from gate.profile import profile_model
    from gate.synth.builder import save_model
    from gate.targets import load_target
    from tests.tradekit import trade_sized_target

    path = tmp_path_factory.mktemp("models") / "model.onnx"
    save_model(proto, path)  # type: ignore[arg-type]
    profile = profile_model(load_model(path, dims), precision)
    base = load_target(target_name) if target_name else trade_sized_target()
    target = replace(base, **(changes or {}))  # type: ignore[arg-type]
    return profile, cost_model(profile, target)


def _peak_share(profile: ModelProfile, cost: object) -> float:
    return profile.total_flops / cost.latency_s / cost.peak_flops_per_s  # type: ignore[attr-defined]


@pytest.mark.parametrize("builder", ["resnet18", "resnet50", "vgg16"])
def test_rebuilt_cnns_reach_a_quarter_to_three_quarters_of_peak_on_the_large_array(
        builder: str, tmp_path_factory: pytest.TempPathFactory) -> None:
    # Common practice, no source: standard CNNs at batch 1 on a large systolic edge array
    # land roughly between 25 % and 75 % of peak throughput.
    from gate.synth import archs

    profile, cost = _cost_of(getattr(archs, builder)(), tmp_path_factory, {"batch": 1})
    assert 0.25 <= _peak_share(profile, cost) <= 0.75
    assert 0.25 <= cost.utilization <= 0.9


def _depthwise_share(profile: ModelProfile, cost: object) -> float:
    """Share of the latency spent in depthwise convolutions."""
    layers = zip(profile.layers, cost.layers)  # type: ignore[attr-defined]
    spent = sum(c.latency_s for layer, c in layers if conv_kind(layer) == "depthwise")
    return spent / cost.latency_s  # type: ignore[attr-defined]


def test_rebuilt_mobilenet_v1_uses_the_large_array_plausibly_and_depthwise_does_not_dominate(
        tmp_path_factory: pytest.TempPathFactory) -> None:
    # MobileNetV1 (Howard et al. 2017, rebuilt in gate/synth/archs.py) at int8, batch 1.
    # Common practice, no source: depthwise-separable CNNs reach well under half of a large
    # systolic array's peak (their depthwise layers and 1x1 convs at 7x7 underfill it),
    # but their pointwise convs keep the array busy: array utilization 15-70 %.
    from gate.synth import archs

    proto = archs.mobilenet_v1()
    profile, cost = _cost_of(proto, tmp_path_factory, {"batch": 1})
    assert 0.15 <= cost.utilization <= 0.7
    assert 0.05 <= _peak_share(profile, cost) <= 0.5
    # Depthwise layers do about 3 % of the MACs (Howard et al. 2017, Table 2: 3.06 % of
    # mult-adds, from memory); on the target's vector unit they no longer take most of the time.
    dw_macs = sum(layer.macs for layer in profile.layers if conv_kind(layer) == "depthwise")
    assert 0.028 < dw_macs / profile.total_macs < 0.033
    assert _depthwise_share(profile, cost) < 0.5  # no longer most of the latency
    slowest = max(zip(profile.layers, cost.layers), key=lambda pair: pair[1].latency_s)
    assert conv_kind(slowest[0]) != "depthwise"
    # Kept on the array, packed block-diagonally (7 channels of K = 9 per pass), each
    # depthwise layer takes under half the cycles of one channel per pass (the 2 K preload
    # cycles per channel remain; at 7x7 they dominate), C x (M - 2 + 2 K + N)
    # (docs/costmodel.md section 2); they still take about half of
    # the time there (the reason the built-in places them on the vector unit).
    _, packed = _cost_of(proto, tmp_path_factory, {"batch": 1},
                         changes={"placement": MappingProxyType({})})
    for layer, cost_on_array in zip(profile.layers, packed.layers):
        if conv_kind(layer) == "depthwise":
            gemm = layer.work.gemms[0]  # type: ignore[union-attr]
            assert cost_on_array.cycles * 2 < gemm.count * (gemm.m - 2 + 2 * 9 + 1)
    assert 0.35 < _depthwise_share(profile, packed) < 0.6


@pytest.mark.parametrize("hidden, inputs", [(128, 40), (1024, 80)])
def test_rebuilt_lstm_runs_under_two_percent_of_peak_on_the_large_array(
        hidden: int, inputs: int, tmp_path_factory: pytest.TempPathFactory) -> None:
    # Common practice, no source: batch-1 recurrent steps (M = 1) leave a large
    # weight-stationary array nearly idle.
    from gate.synth import archs

    proto = archs.recurrent_classifier("lstm", hidden_size=hidden, input_size=inputs)
    profile, cost = _cost_of(proto, tmp_path_factory, {"batch": 1, "seq": 100})
    assert _peak_share(profile, cost) < 0.02


def test_speech_sized_lstm_energy_is_dominated_by_dram_parameter_traffic(
        tmp_path_factory: pytest.TempPathFactory) -> None:
    # Common practice, no source: an LSTM whose weights exceed the parameter buffer
    # (speech-sized: 2 layers, hidden 1024, 4.2 MiB of recurrent weights per layer at
    # int8) streams them from DRAM every step, and that traffic dominates its energy.
    from gate.synth import archs

    proto = archs.recurrent_classifier("lstm", hidden_size=1024, input_size=80)
    _, cost = _cost_of(proto, tmp_path_factory, {"batch": 1, "seq": 100})
    parts = cost.energy.as_dict()
    assert max(parts, key=parts.__getitem__) == "dram_param_j"
    assert parts["dram_param_j"] > 0.5 * cost.energy.total_j
    lstm_layers = [layer for layer in cost.layers if layer.name in ("rnn1", "rnn2")]
    assert lstm_layers and not any(layer.params_fit for layer in lstm_layers)


def _single_conv(channels_in: int, channels_out: int, size: int, group: int) -> object:
    from onnx import TensorProto, helper

    x = helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, channels_in, size, size])
    y = helper.make_tensor_value_info("y", TensorProto.FLOAT, None)
    w = helper.make_tensor("w", TensorProto.FLOAT, [channels_out, channels_in // group, 3, 3],
                           [0.0] * (channels_out * channels_in // group * 9))
    conv = helper.make_node("Conv", ["x", "w"], ["y"], group=group, pads=[1, 1, 1, 1], name="conv")
    graph = helper.make_graph([conv], "conv", [x], [y], initializer=[w])
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])


@pytest.mark.parametrize("target_name", ["ws-64x64-4mib", "os-16x16-512kib"])
def test_onnx_depthwise_conv_underfills_the_array_against_a_standard_conv_of_equal_macs(
        target_name: str, tmp_path_factory: pytest.TempPathFactory) -> None:
    # Common practice, no source. 3x3 depthwise over 64 channels at 56x56 and a standard
    # 3x3 conv 64 -> 64 at 7x7 both do 56*56*64*9 = 7*7*64*576 = 1,806,336 MACs.
    # The built-ins place depthwise convs on the vector unit; placed on the array (no
    # placement) the layer underfills it.
    on_array = {"placement": MappingProxyType({})}
    dw_profile, dw = _cost_of(_single_conv(64, 64, 56, 64), tmp_path_factory, {}, target_name,
                              changes=on_array)
    std_profile, std = _cost_of(_single_conv(64, 64, 7, 1), tmp_path_factory, {}, target_name,
                                changes=on_array)
    assert dw_profile.total_macs == std_profile.total_macs == 1_806_336
    assert dw.layers[0].engine == "array"
    assert dw.utilization < std.utilization / 10
    _, builtin = _cost_of(_single_conv(64, 64, 56, 64), tmp_path_factory, {}, target_name)
    assert builtin.layers[0].engine == "vector"
    assert builtin.latency_s < dw.latency_s  # the target's own choice is the faster one


@pytest.mark.parametrize("group, kind", [(64, "depthwise"), (8, "grouped"), (1, "")])
def test_conv_kind_comes_from_the_group_count_and_input_channels(
        group: int, kind: str, tmp_path_factory: pytest.TempPathFactory) -> None:
    # ONNX Conv (operator spec): group = C_in is depthwise, 1 < group < C_in is grouped.
    profile, _ = _cost_of(_single_conv(64, 64, 8, group), tmp_path_factory, {})
    assert conv_kind(profile.layers[0]) == kind


def test_depthwise_and_grouped_convs_run_where_the_target_places_them() -> None:
    def conv(count: int, channels: int) -> LayerProfile:
        layer = gemm_layer((GemmShape(64, 9 * channels // count, 64 // count, count=count),),
                           op_type="Conv")
        return replace(layer, input_shapes=((1, channels, 8, 8), (64, channels // count, 3, 3)))

    depthwise, grouped, dense = conv(64, 64), conv(8, 64), conv(1, 64)
    batched = gemm_layer((GemmShape(8, 8, 8, count=4),), op_type="MatMul")  # not a conv
    placed = {"depthwise-conv": "vector", "grouped-conv": "host"}
    target = make_target(placement=MappingProxyType(placed))
    engines = [cost.engine for cost in cost_model(
        make_profile(depthwise, grouped, dense, batched), target).layers]
    assert engines == ["vector", "host", "array", "array"]
    only_grouped = make_target(placement=MappingProxyType({"grouped-conv": "vector"}))
    assert cost_model(make_profile(depthwise), only_grouped).layers[0].engine == "vector"
    on_vector = cost_model(make_profile(depthwise), target).layers[0]
    assert on_vector.cycles == ceil(depthwise.macs / 8)  # one MAC per lane op, 8 lanes
    assert on_vector.utilization == 0.0 and on_vector.array_macs == 0


def test_hand_built_target_without_bandwidth_is_refused() -> None:
    with pytest.raises(InputError, match="no DRAM bandwidth"):
        cost_model(make_profile(gemm_layer((GemmShape(4, 4, 4),))), make_target(dram_bytes_per_s=0))
