"""The cyclic collector is paused around the analysis and judging (gate/gcpause.py), and
its previous state always comes back."""

from __future__ import annotations

import gc

import pytest

from gate import jobs
from gate.gcpause import cyclic_gc_paused


def test_pause_nests_and_restores_the_previous_state() -> None:
    assert gc.isenabled()
    with cyclic_gc_paused():
        assert not gc.isenabled()
        with cyclic_gc_paused():
            assert not gc.isenabled()
        assert not gc.isenabled()  # the inner block does not re-enable it early
    assert gc.isenabled()
    gc.disable()
    try:
        with cyclic_gc_paused():
            pass
        assert not gc.isenabled()  # left as it was found: off
    finally:
        gc.enable()


def test_pause_is_lifted_when_the_block_raises() -> None:
    with pytest.raises(ValueError), cyclic_gc_paused():
        raise ValueError("boom")
    assert gc.isenabled()


def test_a_job_is_analysed_and_judged_with_the_collector_paused(tmp_path, monkeypatch) -> None:
    from gate.synth.builder import save_model
    from gate.synth.layers import NetBuilder

    b = NetBuilder("fc")
    b.output(b.gemm(b.input("x", [1, 16]), 8, name="fc"))
    save_model(b.build(), tmp_path / "m.onnx")
    seen: dict[str, bool] = {}
    real = jobs.analyse

    def watching(*args, **kwargs):  # type: ignore[no-untyped-def]
        seen["analysing"] = gc.isenabled()
        return real(*args, **kwargs)

    monkeypatch.setattr(jobs, "analyse", watching)
    job = jobs.Job(model="m.onnx", file=str(tmp_path / "m.onnx"), targets=("ws-64x64-4mib",))
    out = jobs.run_jobs([job], 1, done=lambda key, _: seen.update(judging=gc.isenabled()))
    assert out["m.onnx"][0] and seen == {"analysing": False, "judging": False}
    assert gc.isenabled()
