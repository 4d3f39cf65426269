"""Baseline snapshots: round trip, byte-identical output, clear refusal of other versions."""

from __future__ import annotations

import json
from dataclasses import replace

import pytest

from gate.diff import diff_runs, same_value
from gate.errors import InputError, InternalError
from gate.snapshot import (
    SNAPSHOT_VERSION,
    canonical_json,
    dumps_snapshot,
    loads_snapshot,
    read_snapshot,
    write_snapshot,
)
from tests.recordkit import HOSTILE_NAME, layer, run


def _runs():
    return (
        run("models/trailcam/species.onnx"),
        run("models/handheld/wakeword.onnx", "os-16x16-512kib",
            layers=(layer(HOSTILE_NAME, "GRU", macs=400_000, latency_s=2e-3),)),
        run("models/handheld/wakeword.onnx"),
    )


def test_round_trip_gives_back_equal_records(tmp_path) -> None:
    path = tmp_path / "deep" / "baseline.json"
    write_snapshot(_runs(), str(path))
    back = sorted(read_snapshot(str(path)), key=lambda r: r.key)
    original = sorted(_runs(), key=lambda r: r.key)
    assert [r.key for r in back] == [r.key for r in original]
    for got, want in zip(back, original):
        # Equal up to the float rounding of the file (ints and strings exactly).
        assert replace(got, metrics={}, layers=()) == replace(want, metrics={}, layers=())
        assert [replace(l, metrics={}) for l in got.layers] == [
            replace(l, metrics={}) for l in want.layers]
        diff = diff_runs(want, got)
        assert all(same_value(b, h) for b, h in diff.totals.values())
        assert {c.status for c in diff.layers} == {"unchanged"}
    assert back[0].layers[0].name == HOSTILE_NAME  # control characters survive JSON escaping
    assert not list(tmp_path.glob("deep/.*partial"))


def test_identical_inputs_give_identical_bytes_whatever_the_order() -> None:
    runs = _runs()
    shuffled_metrics = tuple(
        replace(r, metrics=dict(reversed(list(r.metrics.items())))) for r in reversed(runs))
    assert dumps_snapshot(runs) == dumps_snapshot(shuffled_metrics)
    text = dumps_snapshot(runs)
    assert text.endswith("}\n") and "\r" not in text
    assert dumps_snapshot(loads_snapshot(text)) == text  # idempotent through a read


def test_layout_is_versioned_sorted_and_keeps_layers() -> None:
    data = json.loads(dumps_snapshot(_runs()))
    assert (data["format"], data["version"]) == ("roofgate-snapshot", SNAPSHOT_VERSION)
    assert [(r["model"], r["target"]) for r in data["runs"]] == [
        ("models/handheld/wakeword.onnx", "os-16x16-512kib"),
        ("models/handheld/wakeword.onnx", "ws-64x64-4mib"),
        ("models/trailcam/species.onnx", "ws-64x64-4mib")]
    species = data["runs"][2]
    assert [l["name"] for l in species["layers"]] == ["stem/conv", "stage1/relu", "head/gemm"]
    assert species["metrics"]["macs"] == 6000 and isinstance(species["metrics"]["macs"], int)


def test_floats_are_rounded_to_fixed_significant_digits() -> None:
    text = canonical_json({"a": 1.0 / 3.0, "b": -0.0, "c": 2.0, "d": [1e-17 / 3]})
    assert json.loads(text) == {"a": 0.333333333333, "b": 0.0, "c": 2.0, "d": [3.33333333333e-18]}
    assert '"b": 0.0' in text and '"c": 2.0' in text  # floats stay floats, no "-0.0"


def test_non_finite_numbers_are_refused_not_written() -> None:
    bad = run(latency_s=float("nan"))
    with pytest.raises(InternalError, match="non-finite"):
        dumps_snapshot([bad])


@pytest.mark.parametrize(("doc", "message"), [
    ({"format": "roofgate-snapshot", "version": 3, "runs": []},
     "version 3 was written by a newer roofgate; this one reads version 2: upgrade roofgate"),
    ({"format": "roofgate-snapshot", "version": 0, "runs": []},
     "version 0 is older than this roofgate reads"),
    ({"format": "roofgate-snapshot", "runs": []}, "without an integer 'version'"),
    ({"format": "something-else", "version": 1}, "not a roofgate-snapshot file"),
    ([1, 2], "not a roofgate-snapshot file"),
    ({"format": "roofgate-snapshot", "version": 1}, "no 'runs' list"),
    ({"format": "roofgate-snapshot", "version": 1, "runs": [{"model": "m"}]},
     r"runs\[0\]: missing key"),
])
def test_other_versions_and_damage_get_one_clear_message(tmp_path, doc, message) -> None:
    path = tmp_path / "base.json"
    path.write_text(json.dumps(doc), encoding="utf-8")
    with pytest.raises(InputError, match=message) as info:
        read_snapshot(str(path))
    assert str(path) in info.value.format_message()
    assert "\n" not in info.value.format_message()


def test_not_json_or_not_utf8_or_missing(tmp_path) -> None:
    broken = tmp_path / "broken.json"
    broken.write_text("{\"format\": ", encoding="utf-8")
    with pytest.raises(InputError, match="invalid JSON at line 1"):
        read_snapshot(str(broken))
    binary = tmp_path / "model.onnx"
    binary.write_bytes(b"\x08\xff\xfe\x00")
    with pytest.raises(InputError, match="not UTF-8"):
        read_snapshot(str(binary))
    with pytest.raises(InputError, match="cannot read"):
        read_snapshot(str(tmp_path / "absent.json"))


def test_a_model_target_pair_appears_once() -> None:
    text = dumps_snapshot([run()])
    data = json.loads(text)
    data["runs"].append(data["runs"][0])
    with pytest.raises(InputError, match="two runs of model"):
        loads_snapshot(json.dumps(data))


def test_write_to_stdout(capsys) -> None:
    write_snapshot([run()], "-")
    assert json.loads(capsys.readouterr().out)["format"] == "roofgate-snapshot"


def test_any_name_survives_even_a_lone_surrogate(tmp_path) -> None:
    odd = "conv\ud800\u00e9\u2028\U0001f600"
    path = tmp_path / "odd.json"
    write_snapshot([run(layers=(layer(odd),))], str(path))
    assert path.read_bytes().isascii()
    assert read_snapshot(str(path))[0].layers[0].name == odd


def test_a_version_1_snapshot_still_reads_and_unknown_metrics_round_trip(tmp_path) -> None:
    """Version 2 only allows null (unknown) metrics, so version 1 files stay readable; an
    unknown figure comes back unknown, never 0."""
    from gate.records import run_to_dict

    record = run()
    unknown = replace(record, metrics={**record.metrics, "latency_s": None})
    path = tmp_path / "v1.json"
    path.write_text(json.dumps({"format": "roofgate-snapshot", "version": 1,
                                "runs": [run_to_dict(record)]}), encoding="utf-8")
    assert [r.key for r in read_snapshot(str(path))] == [record.key]
    write_snapshot([unknown], str(tmp_path / "v2.json"))
    (back,) = read_snapshot(str(tmp_path / "v2.json"))
    assert back.metrics["latency_s"] is None


def test_a_snapshot_streams_to_the_file_and_one_over_the_limit_leaves_nothing(
        tmp_path, monkeypatch, capsys) -> None:
    from gate import jsontext, snapshot

    monkeypatch.setattr(jsontext, "PIECE_CHARS", 100)  # many pieces
    path = tmp_path / "base.json"
    write_snapshot(_runs(), str(path))
    assert path.read_text(encoding="utf-8") == dumps_snapshot(_runs())
    size = path.stat().st_size
    monkeypatch.setattr(snapshot, "MAX_SNAPSHOT_BYTES", size - 1)
    bigger = tmp_path / "bigger.json"
    with pytest.raises(InputError, match=f"over the {size - 1}-byte limit"):
        write_snapshot(_runs(), str(bigger))
    assert sorted(p.name for p in tmp_path.iterdir()) == ["base.json"]  # no partial file
    with pytest.raises(InputError, match="byte limit"):
        write_snapshot(_runs(), "-")
    assert capsys.readouterr().out == ""
    monkeypatch.setattr(snapshot, "MAX_SNAPSHOT_BYTES", size)  # exactly the limit: written
    write_snapshot(_runs(), str(bigger))
    assert bigger.read_bytes() == path.read_bytes()
