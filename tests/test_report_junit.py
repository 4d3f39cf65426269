"""JUnit XML: parsed back and checked for what CI test reporters require.

Structure checked against the JUnit XML layout CI servers read (a
``testsuites`` root, ``testsuite`` with name/tests/failures/errors/skipped,
``testcase`` with name/classname, ``failure``/``error``/``skipped`` children;
common practice, no single published schema), and XML 1.0 character rules
(W3C XML 1.0, section 2.2 "Characters").
"""

from __future__ import annotations

import io
import warnings
import xml.etree.ElementTree as ET

import pytest

from gate.report.junit import REPORTER, render
from gate.result import FAIL, ModelError
from tests.recordkit import (
    demo_result,
    entry,
    finding,
    layer,
    result,
    run,
    verdict,
)


def _parse(text: str) -> ET.Element:
    return ET.fromstring(text.encode("utf-8"))


def _check_structure(root: ET.Element) -> None:
    """Counts on every suite and on the root match the child elements."""
    assert root.tag == "testsuites"
    totals = {"tests": 0, "failures": 0, "errors": 0}
    for suite in root.findall("testsuite"):
        cases = suite.findall("testcase")
        assert suite.get("name")
        assert int(suite.get("tests")) == len(cases) > 0
        assert int(suite.get("failures")) == sum(len(c.findall("failure")) for c in cases)
        assert int(suite.get("errors")) == sum(len(c.findall("error")) for c in cases)
        assert int(suite.get("skipped")) == sum(len(c.findall("skipped")) for c in cases)
        for case in cases:
            assert case.get("name") and case.get("classname")
            for outcome in case.findall("failure") + case.findall("error"):
                assert outcome.get("message") and outcome.get("type") and outcome.text
        for key in totals:
            totals[key] += int(suite.get(key))
    for key, value in totals.items():
        assert int(root.get(key)) == value


def test_demo_structure_counts_and_golden() -> None:
    text = render(demo_result())
    root = _parse(text)
    _check_structure(root)
    assert (root.get("tests"), root.get("failures"), root.get("errors")) == ("5", "1", "1")
    assert render(demo_result()) == text  # no timestamps: a pure function of the result


def test_one_suite_per_model_target_and_key_metrics_as_properties() -> None:
    root = _parse(render(demo_result()))
    names = [s.get("name") for s in root.findall("testsuite")]
    # worst first: the failing species model leads
    assert names[:2] == ["models/trailcam/species.onnx [ws-64x64-4mib]",
                         "models/handheld/wakeword.onnx [ws-64x64-4mib]"]
    species = root.findall("testsuite")[0]
    props = {p.get("name"): p.get("value") for p in species.iter("property")}
    assert props["param_bytes"] == "5000256" and props["base_param_bytes"] == "2304"
    assert props["latency_s"] == "0.00043" and props["status"] == "fail"
    assert props["worst_layer"] == "head/gemm"
    assert [c.get("name") for c in species.findall("testcase")] == [
        "fits-param-buffer", "min-utilization", "max-latency"]


def test_failure_message_names_layer_metric_value_limit_and_remedy() -> None:
    root = _parse(render(demo_result()))
    failure = root.find(".//testcase[@name='fits-param-buffer']/failure")
    message = failure.get("message")
    # one sentence: model, target, rule, layer, value against limit, the remedy once
    assert message.startswith("models/trailcam/species.onnx on ws-64x64-4mib: rule "
                              "fits-param-buffer fails at layer head/gemm: parameter size "
                              "4.77 MiB, above the limit of 4.00 MiB. Fix: split the layer")
    assert message.count("split the layer") == 1


def test_waived_rule_is_skipped_with_reason_and_expiry() -> None:
    root = _parse(render(demo_result()))
    skipped = root.find(".//testcase[@name='min-utilization']/skipped")
    assert skipped.get("message") == ("waived: elementwise add, tracked in #12 "
                                      "(expires 2026-12-31)")
    assert "utilization" in skipped.text


def test_failure_without_findings_message_or_remedy_is_never_dropped() -> None:
    # junit-xml drops a failure that has neither message nor output: we always give both.
    bare = verdict("opaque", status=FAIL, remedy="")
    bare = type(bare)(**{**{f: getattr(bare, f) for f in bare.__slots__}, "summary": ""})
    root = _parse(render(result(entry(run(), verdicts=(bare,)))))
    failure = root.find(".//testcase[@name='opaque']/failure")
    assert failure is not None and failure.get("message") and failure.text
    _check_structure(root)


def test_warning_failures_pass_but_say_so_in_system_out() -> None:
    warn = verdict("min-util", status=FAIL, severity="warning",
                   findings=(finding(metric="utilization", value=0.1, limit=0.3),))
    root = _parse(render(result(entry(run(), verdicts=(warn,)))))
    case = root.find(".//testcase[@name='min-util']")
    assert case.find("failure") is None and case.find("skipped") is None
    assert case.find("system-out").text.startswith("warning (does not block the merge)")
    assert root.find(".//property[@name='warnings']").get("value") == "1"


def test_unanalysable_model_is_an_error_even_when_the_policy_allows_it() -> None:
    for allowed in (False, True):
        res = result(errors=(ModelError("models/bad.onnx", "not a valid ONNX file"),))
        res = type(res)(**{**{f: getattr(res, f) for f in res.__slots__}, "allow_errors": allowed})
        root = _parse(render(res))
        _check_structure(root)
        error = root.find(".//testcase/error")
        assert "models/bad.onnx" in error.get("message") and root.get("errors") == "1"


def test_hostile_names_stay_readable_and_valid_xml() -> None:
    name = "a\rb\x00c<d>&\"e\x1b\U0010ffff\ud800"
    res = result(entry(run(layers=(layer(name),)), verdicts=(verdict(
        name, status=FAIL, findings=(finding(name, message=f"layer {name} too big"),)),)))
    text = render(res)
    root = _parse(text)  # parses: nothing XML 1.0 forbids got through
    case = root.find(".//testcase")
    assert case.get("name") == 'a\\rb\\x00c<d>&"e\\x1b\\U0010ffff\\ud800'
    assert "a\\rb\\x00c<d>" in case.find("failure").get("message")


def test_hostile_demo_name_keeps_every_character_visible() -> None:
    root = _parse(render(demo_result()))
    text = root.find(".//testcase[@name='min-utilization']/skipped").text
    assert "`<img src=x onerror=alert(1)></details>@all\\r\\n# head\\x00\\x1b[31m\\x85&amp;" in text


def test_empty_run_renders_one_passing_case_with_the_note() -> None:
    root = _parse(render(result(notes=("no models changed",))))
    _check_structure(root)
    assert root.get("tests") == "1" and root.get("failures") == "0"
    assert root.find(".//system-out").text == "no models changed"


def test_reporter_writes_without_deprecation_warnings() -> None:
    stream = io.StringIO()
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        REPORTER.write(demo_result(), stream)
    assert stream.getvalue().startswith("<?xml")
    assert REPORTER.name == "junit"


# --- the document text is junit-xml's, without its serialize/parse/pretty-print trip -----
# Reference: junit_xml.to_xml_report_string(prettyprint=True), the package's own writer.

def _hostile_result():
    name = "a\rb\x00c<d>&\"e\x1b\U0010ffff\ud800\t\n\u2028 ]]> &amp; \x85"
    return result(entry(run(layers=(layer(name),)), verdicts=(verdict(
        name, status=FAIL, findings=(finding(name, message=f"layer {name} too big"),)),)),
        notes=(f"note with {name}",))


@pytest.mark.parametrize("make", [demo_result, _hostile_result,
                                  lambda: result(notes=("no models changed",))])
def test_text_is_byte_identical_to_junit_xmls_own_writer(make) -> None:
    from junit_xml import to_xml_report_string

    from gate.report.junit import junit_suites

    res = make()
    assert render(res) == to_xml_report_string(junit_suites(res), prettyprint=True)


def test_raw_strings_are_treated_as_junit_xml_treats_them() -> None:
    # Strings that did not pass xml_safe: the characters junit-xml deletes are deleted,
    # markup characters escaped as minidom escapes them, a text of deleted characters
    # only leaves an empty element; the same bytes as the package's writer.
    from junit_xml import TestCase, TestSuite, to_xml_report_string

    from gate.report.junit import _document_text

    case = TestCase('x<"&>\x01\r\ty\n', classname="c\x7f")
    case.stdout = "\x01\x02"  # only deleted characters: <system-out/>
    case.add_failure_info(message="m\x0b&", output="line 1\r\nline 2 <&>\"'")
    other = TestCase("plain")
    other.add_skipped_info(message="why", output="\x1f")
    suites = [TestSuite("s\x00", [case, other], properties={"k\x08": "v&<"}),
              TestSuite("empty", [TestCase("only")])]
    assert _document_text(suites) == to_xml_report_string(suites, prettyprint=True)


def test_a_character_xml_cannot_hold_is_an_internal_error_not_a_broken_file() -> None:
    from junit_xml import TestCase, TestSuite

    from gate.errors import InternalError
    from gate.report.junit import _document_text

    with pytest.raises(InternalError, match="U\\+D800"):
        _document_text([TestSuite("s", [TestCase("bad \ud800")])])
