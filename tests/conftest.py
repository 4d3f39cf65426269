"""Shared pytest fixtures."""

from __future__ import annotations

import pytest


@pytest.fixture(scope="session")
def small_cnn_analysed(tmp_path_factory):  # type: ignore[no-untyped-def]
    """A small CNN's profile, its cost on ws-64x64-4mib and its run record."""
    from gate.costmodel import cost_model
    from gate.model.loader import load_model
    from gate.profile import profile_model
    from gate.summarize import build_run_record
    from gate.targets import load_target
    from tests.loadkit import save, small_cnn

    path = save(small_cnn(), tmp_path_factory.mktemp("m") / "cnn.onnx")
    profile = profile_model(load_model(path))
    target = load_target("ws-64x64-4mib")
    cost = cost_model(profile, target)
    return profile, cost, build_run_record(str(path), profile, cost, target)
