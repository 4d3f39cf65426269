"""Remedies fit the run they are given for, and every report says each one once per finding.

The default remedies are roofgate's own advice (common practice, no source): a run
already at 8 bits is not told to quantize to int8; a target with one unified buffer
is not told about a "parameter buffer"; ``check`` (base read from git, refreshed by
the merge itself) is not told to refresh a baseline snapshot.
"""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import pytest

from gate.policy import spec
from gate.policy.rules import remedy_of
from gate.policy.spec import Rule, Scope
from tests.recordkit import FIGURES, run


def _rule(kind: str, **fields: object) -> Rule:
    return Rule(id="r", kind=kind, severity="error", description="", remedy="", scope=Scope(),
                **fields)  # type: ignore[arg-type]


@pytest.mark.parametrize("precision", ["int8", "INT8", "uint8", "int4"])
def test_no_int8_quantization_advice_at_8_bits_or_less(precision: str) -> None:
    head = replace(run(), precision=precision)
    for kind in (spec.FITS_IN_BUFFER, spec.MAX_PARAM_DRAM, spec.MAX_LATENCY, spec.MAX_ENERGY):
        assert "quantize" not in remedy_of(_rule(kind), head), kind


@pytest.mark.parametrize("precision", ["fp32", "fp16"])
def test_quantization_is_advised_above_8_bits(precision: str) -> None:
    head = replace(run(), precision=precision)
    assert "quantize the weights to int8" in remedy_of(_rule(spec.FITS_IN_BUFFER), head)


def test_unified_buffer_targets_get_unified_buffer_advice() -> None:
    split = run()
    unified = replace(split, target_figures={**FIGURES, "unified_buffer_bytes": 512 * 1024})
    params = _rule(spec.FITS_IN_BUFFER, check_params=True, check_activations=False)
    assert "larger parameter buffer" in remedy_of(params, split)
    assert "larger unified buffer" in remedy_of(params, unified)
    acts = _rule(spec.FITS_IN_BUFFER, check_params=False, check_activations=True)
    assert "larger unified buffer" in remedy_of(acts, unified)
    assert "larger activation buffer" in remedy_of(acts, split)


def test_refresh_the_baseline_only_where_there_is_a_snapshot() -> None:
    rule = _rule(spec.MAX_REGRESSION, metric="latency_s", max_change_pct=5.0)
    assert "refresh the baseline snapshot" in remedy_of(rule, run())
    assert "baseline" not in remedy_of(rule, run(), base_from_git=True)


def test_a_rules_own_remedy_is_kept_word_for_word() -> None:
    rule = replace(_rule(spec.FITS_IN_BUFFER), remedy="ask the platform team")
    assert remedy_of(rule, replace(run(), precision="int8")) == "ask the platform team"


def test_baseline_names_every_model_that_failed(tmp_path: Path) -> None:
    """`baseline` refuses a partial snapshot and names the models that failed, not
    "(and 2 more)"."""
    from click.testing import CliRunner

    from gate.cli import cli

    bad = []
    for name in ("a.onnx", "b.onnx", "c.onnx"):
        path = tmp_path / name
        path.write_bytes(b"not an onnx file")
        bad.append(str(path))
    done = CliRunner().invoke(cli, ["baseline", *bad, "-t", "ws-64x64-4mib",
                                    "-o", str(tmp_path / "snap.json")])
    assert done.exit_code == 2
    assert "also failed: " in done.output and "b.onnx" in done.output and "c.onnx" in done.output
    assert "more models failed" not in done.output
    assert not (tmp_path / "snap.json").exists()
