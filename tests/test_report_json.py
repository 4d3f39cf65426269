"""JSON result report: versioned, deterministic, and read back into the same result."""

from __future__ import annotations

import io
import json

import pytest

from gate.errors import InputError
from gate.report.jsonout import (
    REPORTER,
    RESULT_FORMAT,
    RESULT_VERSION,
    loads_result,
    read_result,
    render,
)
from gate.result import result_to_dict
from tests.recordkit import HOSTILE_NAME, demo_result, result


def test_document_wraps_the_result_with_format_version_and_exit_code() -> None:
    document = json.loads(render(demo_result()))
    assert (document["format"], document["version"]) == (RESULT_FORMAT, RESULT_VERSION)
    assert document["exit_code"] == demo_result().exit_code == 2
    assert set(document["result"]) == set(result_to_dict(demo_result()))


def test_round_trip_reproduces_the_same_bytes_and_the_hostile_name(tmp_path) -> None:
    text = render(demo_result())
    path = tmp_path / "r.json"
    path.write_text(text, encoding="utf-8")
    back = read_result(str(path))
    assert render(back) == text
    names = [c.head_name for e in back.entries if e.diff for c in e.diff.layers]
    assert HOSTILE_NAME in names
    assert back.exit_code == demo_result().exit_code


def test_identical_results_give_identical_bytes() -> None:
    assert render(demo_result()) == render(demo_result())
    assert render(demo_result()).endswith("}\n")


def test_empty_result_with_a_note() -> None:
    document = json.loads(render(result(notes=("no models changed",))))
    assert document["result"]["entries"] == [] and document["result"]["notes"] == [
        "no models changed"]
    assert document["exit_code"] == 0


@pytest.mark.parametrize(("text", "message"), [
    ("[", "invalid JSON"),
    (json.dumps({"format": "roofgate-result", "version": 7, "result": {}}), "newer roofgate"),
    (json.dumps({"format": "roofgate-snapshot", "version": 1}), "not a roofgate-result"),
    (json.dumps({"format": "roofgate-result", "version": 2, "result": {}}), "damaged"),
])
def test_unreadable_documents_get_a_clear_message(text, message) -> None:
    with pytest.raises(InputError, match=message):
        loads_result(text, "r.json")


def test_reporter_protocol() -> None:
    stream = io.StringIO()
    REPORTER.write(demo_result(), stream)
    assert REPORTER.name == "json" and json.loads(stream.getvalue())["version"] == RESULT_VERSION
