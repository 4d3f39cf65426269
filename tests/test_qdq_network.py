"""A whole network in QDQ form against the float graph costed at ``--precision int8``.

ResNet-18 (He et al. 2016, Table 1; rebuilt in ``gate.synth.archs``) written in QDQ
form by ``gate.synth.forms.quantize``: every Conv and Gemm reads DequantizeLinear of
int8 weights (int32 biases) and quantized activations, the QDQ convention of the ONNX
quantization tools (ONNX operator spec: DequantizeLinear / QuantizeLinear). The
builder quantizes only the matrix ops; BatchNormalization, Relu, the residual Add,
MaxPool and GlobalAveragePool stay float, as a partial export leaves them.

What must hold, and where the two differ, pinned by layer name so a future change to
the precision reading, the builder or the cost model is caught:

- MACs and the parameter count are identical; the parameter bytes differ by exactly
  the BatchNormalization parameters, stored fp32 in the QDQ graph (4 bytes) and counted
  at int8 (1 byte) under ``--precision int8``.
- Costed layer by layer (``fusion=False``), every Conv and Gemm costs the same; every
  layer that differs is one the builder left float (its float activations move 4
  bytes per element instead of 1).
- Costed with the target's fusion (its default), BatchNormalization folds into the
  conv groups and Relu/Add run as their epilogues, so the difference shows at the
  group heads. A folded BN vector becomes the conv's bias, stored as the conv stores
  its parameters (int8 in both forms), so the conv heads fetch the same bytes. Only
  three layers differ: ``stem.conv`` (its group writes the 112x112x64 ReLU output at
  fp32 because MaxPool reads it as float: 3.2 MB, beyond the 3 MiB activation buffer,
  so it spills to DRAM), ``stem.pool`` (which reads that fp32 tensor back) and
  ``head.pool`` (GlobalAveragePool left float reads fp32 activations).
"""

from __future__ import annotations

import math
from pathlib import Path

import pytest

from gate.costmodel import ModelCost, cost_model
from gate.model.loader import load_model
from gate.profile import ModelProfile, profile_model
from gate.synth import archs, save_model
from gate.synth.forms import quantize
from gate.targets import load_target

TARGET = "ws-64x64-4mib"  # 3 MiB activation buffer
FP32_BYTES, INT8_BYTES = 4, 1
# ResNet-18's basic blocks (He et al. 2016, Table 1): two per stage, a 1x1 projection
# shortcut in the first block of stages 2-4.
BLOCKS = [f"stage{stage}.block{block}" for stage in (1, 2, 3, 4) for block in (1, 2)]
SHORTCUTS = {"stage2.block1", "stage3.block1", "stage4.block1"}


def _convs() -> list[str]:
    names = ["stem.conv"]
    for block in BLOCKS:
        names += [f"{block}.conv1", f"{block}.conv2"]
        names += [f"{block}.shortcut"] if block in SHORTCUTS else []
    return names


def _float_layers() -> set[str]:
    """Every layer the QDQ builder leaves float, by name."""
    names = {"stem.conv.bn", "stem.conv.relu", "stem.pool", "head.pool"}
    for block in BLOCKS:
        names |= {f"{block}.conv1.bn", f"{block}.conv1.relu", f"{block}.conv2.bn",
                  f"{block}.add", f"{block}.relu"}
        names |= {f"{block}.shortcut.bn"} if block in SHORTCUTS else set()
    return names


@pytest.fixture(scope="module")
def profiles(tmp_path_factory) -> tuple[ModelProfile, ModelProfile]:
    folder: Path = tmp_path_factory.mktemp("qdq")
    float_path = save_model(archs.resnet18(batch=1), folder / "float.onnx")
    qdq_path = save_model(quantize(archs.resnet18(batch=1), "qdq"), folder / "qdq.onnx")
    return (profile_model(load_model(str(float_path)), "int8"),
            profile_model(load_model(str(qdq_path))))


def _costs(profiles: tuple[ModelProfile, ModelProfile], fusion: bool
           ) -> tuple[dict, dict]:
    target = load_target(TARGET)
    at_int8, qdq = (cost_model(p, target, fusion=fusion) for p in profiles)
    return _by_name(at_int8), _by_name(qdq)


def _by_name(cost: ModelCost) -> dict:
    return {layer.name: layer for layer in cost.layers}


def _differ(a: float | None, b: float | None) -> bool:
    assert a is not None and b is not None
    return not math.isclose(a, b, rel_tol=1e-9, abs_tol=0.0)


def test_macs_and_parameter_count_are_identical(profiles) -> None:
    at_int8, qdq = profiles
    # He et al. 2016, Table 1: 1.8 x 10^9 multiply-adds for ResNet-18
    assert qdq.total_macs == at_int8.total_macs == 1_814_073_344
    # 11,689,512 weights (the commonly cited count, from memory) plus 9,600 BN running
    # statistics (mean and variance of 4,800 channels), which an inference graph stores
    assert qdq.total_param_count == at_int8.total_param_count == 11_689_512 + 9_600
    bn_params = sum(layer.param_count for layer in qdq.layers
                    if layer.op_type == "BatchNormalization")
    assert bn_params == 4 * 4800  # scale, bias, mean, variance of 4800 channels in all
    assert qdq.total_param_bytes - at_int8.total_param_bytes == bn_params * (
        FP32_BYTES - INT8_BYTES)


def test_layer_by_layer_only_the_layers_left_float_differ(profiles) -> None:
    at_int8, qdq = _costs(profiles, fusion=False)
    assert set(qdq) >= set(at_int8)  # the QDQ graph adds its (absorbed) Q/DQ nodes
    differing = {name for name, layer in at_int8.items()
                 if _differ(layer.latency_s, qdq[name].latency_s)
                 or _differ(layer.energy.total_j, qdq[name].energy.total_j)}
    assert differing == _float_layers()
    assert len(differing) == 47
    for name in [*_convs(), "head.fc"]:  # the matrix layers: identical, int8 both
        assert not _differ(at_int8[name].latency_s, qdq[name].latency_s), name
        assert not _differ(at_int8[name].energy.total_j, qdq[name].energy.total_j), name
    added = [name for name in set(qdq) - set(at_int8) if qdq[name].latency_s]
    assert added == []  # every Q/DQ node the QDQ graph adds costs nothing


def test_with_fusion_the_difference_sits_at_the_group_heads(profiles) -> None:
    at_int8, qdq = _costs(profiles, fusion=True)
    slower = {name for name, layer in at_int8.items()
              if _differ(layer.latency_s, qdq[name].latency_s)}
    assert slower == {"stem.conv", "stem.pool"}
    assert at_int8["stem.conv"].act_dram_bytes == 0
    assert qdq["stem.conv"].act_dram_bytes == 150_528 + 112 * 112 * 64 * FP32_BYTES  # spilled
    costlier = {name for name, layer in at_int8.items()
                if _differ(layer.energy.total_j, qdq[name].energy.total_j)}
    assert costlier == {"stem.conv", "stem.pool", "head.pool"}
    # a folded BN vector becomes the int8 conv's bias, stored as the conv stores its
    # parameters, in both forms: every conv head fetches the same parameter bytes
    for name in _convs():
        assert qdq[name].param_dram_bytes == at_int8[name].param_dram_bytes, name



def test_on_a_small_buffer_the_float_residual_joins_show_and_nothing_else(profiles) -> None:
    """On ``os-16x16-512kib`` (512 KiB unified buffer) the residual Add's output stays
    float in the QDQ graph, as on every target, but here its Relu runs as its own vector
    layer (reading that fp32 tensor) and the conv groups feeding the join write more than
    the buffer holds in stages 1-2, where activations are largest, so they spill. Pinned by
    name: every other layer, every conv of stages 3-4 included, costs the same."""
    target = load_target("os-16x16-512kib")
    at_int8, qdq = (_by_name(cost_model(p, target)) for p in profiles)
    differing = {name for name, layer in at_int8.items()
                 if _differ(layer.latency_s, qdq[name].latency_s)
                 or _differ(layer.energy.total_j, qdq[name].energy.total_j)}
    joins = {f"{block}.relu" for block in BLOCKS}
    spilling = {"stage1.block1.conv2", "stage1.block2.conv2", "stage2.block1.conv2",
                "stage2.block2.conv2", "stage2.block1.shortcut"}
    assert differing == {"stem.conv", "stem.pool", "head.pool"} | joins | spilling
    for name in joins:  # the Relu reads the Add's fp32 output: 4 bytes an element, not 1
        assert qdq[name].engine == "vector"
    for name in spilling:
        assert qdq[name].act_dram_bytes > at_int8[name].act_dram_bytes, name
