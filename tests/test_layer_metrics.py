"""A layer record's metrics view (``gate.summarize.LayerMetrics``) behaves as the dict it
replaced: the same keys in the same order, the same values, equal to that dict, pickled and
canonicalised as a plain dict.

The expected dict is spelled out here from the layer's profile and cost, as
``build_run_record`` built it before the view existed.
"""

from __future__ import annotations

import pickle

from gate.records import canonical_run, layer_to_dict
from gate.summarize import LayerMetrics


def _expected(layer, cost) -> dict:  # type: ignore[no-untyped-def]
    energy = cost.energy
    parts = ([energy.mac_j, energy.buffer_j, energy.noc_j, energy.dram_param_j,
              energy.dram_act_j, energy.static_j] if energy is not None else [None] * 6)
    achieved = (None if layer.flops is None or cost.latency_s is None else
                layer.flops / cost.latency_s if cost.latency_s > 0 else 0.0)
    return {
        "macs": layer.macs, "flops": layer.flops, "param_count": layer.param_count,
        "param_bytes": layer.param_bytes, "input_bytes": layer.input_bytes,
        "output_bytes": layer.output_bytes, "arithmetic_intensity": layer.arithmetic_intensity,
        "param_reuse": layer.param_reuse, "cycles": cost.cycles, "utilization": cost.utilization,
        "compute_s": cost.compute_s, "memory_s": cost.memory_s, "overhead_s": cost.overhead_s,
        "latency_s": cost.latency_s, "param_dram_bytes": cost.param_dram_bytes,
        "act_dram_bytes": cost.act_dram_bytes, "achieved_flops_per_s": achieved,
        "energy_j": None if energy is None else energy.total_j,
        **dict(zip(("energy_mac_j", "energy_buffer_j", "energy_noc_j", "energy_dram_param_j",
                    "energy_dram_act_j", "energy_static_j"), parts)),
    }


def test_metrics_view_is_the_dict_it_replaced(small_cnn_analysed) -> None:  # type: ignore[no-untyped-def]
    profile, cost, run = small_cnn_analysed
    for layer, layer_cost, record in zip(profile.layers, cost.layers, run.layers):
        expected = _expected(layer, layer_cost)
        view = record.metrics
        assert isinstance(view, LayerMetrics)
        assert list(view) == list(expected) and len(view) == len(expected)
        assert [view[name] for name in view] == list(expected.values())
        assert list(view.as_dict().items()) == list(expected.items())  # spelled out alike
        assert list(view.items()) == list(expected.items())
        assert view == expected and expected == view
        assert record.metric("latency_s") == expected["latency_s"]
        assert "latency_s" in view and "nothing" not in view and view.get("nothing") is None
        assert pickle.loads(pickle.dumps(view)) == expected
        assert type(pickle.loads(pickle.dumps(view))) is dict
        assert layer_to_dict(record)["metrics"] == dict(sorted(expected.items()))
    assert run.layers[0].metrics != {**_expected(profile.layers[0], cost.layers[0]), "macs": -1}


def test_a_layer_without_energy_reads_none_for_every_energy_metric(small_cnn_analysed) -> None:  # type: ignore[no-untyped-def]
    from dataclasses import replace

    profile, cost, _run = small_cnn_analysed
    layer, layer_cost = profile.layers[0], replace(cost.layers[0], energy=None)
    view = LayerMetrics(layer, layer_cost)
    expected = _expected(layer, layer_cost)
    assert list(view.as_dict().items()) == list(expected.items())
    assert [view[name] for name in view] == list(expected.values())
    assert view["energy_j"] is None and view["energy_noc_j"] is None


def test_canonical_records_hold_plain_dicts(small_cnn_analysed) -> None:  # type: ignore[no-untyped-def]
    _profile, _cost, run = small_cnn_analysed
    canonical = canonical_run(run)
    assert all(type(layer.metrics) is dict for layer in canonical.layers)
    assert canonical == run  # equal: same names, values and order of every field
