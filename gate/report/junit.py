"""JUnit XML report: one test suite per model x target, one test case per rule evaluation.

The only module that uses the junit-xml package, wrapped here because of its pitfalls:

* a failure with neither message nor output is silently dropped, so every
  failure, error and skip here gets both;
* it deletes XML-invalid characters (carriage returns included) instead of
  escaping them, so every string goes through ``xml_safe`` first and stays
  readable (``\\r``, ``\\x00``);
* properties exist only on test suites, so the key metrics go there;
* ``to_xml_report_string`` serializes the tree, parses the text back with
  minidom and pretty-prints it (most of the report's time on a large audit),
  so this module builds each suite's element with junit-xml
  (``TestSuite.build_xml_doc``) and writes the document itself
  (``_document_text``) exactly as that function writes it: the same
  ``testsuites`` totals, the characters junit-xml deletes deleted, minidom's
  escaping and tab indent. ``TestSuite.to_xml_string`` is deprecated anyway.

Status mapping: an error-severity rule that failed is a ``<failure>``; a
warning-severity rule that failed passes (it does not block the merge, as the
exit code says) but carries the findings in ``<system-out>`` and counts in the
suite's ``warnings`` property; a waived rule is ``<skipped>`` with the reason;
a model that could not be analysed is an ``<error>`` (never a pass). No
timestamps or host names are written, so the output is a pure function of the result.
"""

from __future__ import annotations

import re
from collections import defaultdict
from collections.abc import Sequence
from typing import TextIO
from xml.etree.ElementTree import Element

from junit_xml import TestCase, TestSuite

from gate import metrics
from gate.errors import InternalError
from gate.report.text import xml_safe
from gate.result import (
    FAIL,
    NOT_GATED,
    WAIVED,
    Blocker,
    Entry,
    Finding,
    GateResult,
    ModelError,
    UngatedModel,
    Verdict,
)

# Model metrics written as suite properties (raw numbers, unit in the name).
PROPERTY_METRICS = (
    "latency_s", "inferences_per_s", "utilization", "macs", "param_bytes",
    "max_layer_param_bytes", "param_dram_bytes", "energy_j", "coverage_work_share",
    "unmodelled_nodes",
)
MAX_LISTED_FINDINGS = 200  # per test case output; the rest are counted


class JunitReporter:
    name = "junit"
    help = "Write a JUnit XML report to PATH"

    def write(self, result: GateResult, stream: TextIO) -> None:
        stream.write(render(result))


REPORTER = JunitReporter()


def render(result: GateResult) -> str:
    """The JUnit XML text of ``result``."""
    return _document_text(junit_suites(result))


def junit_suites(result: GateResult) -> list[TestSuite]:
    """The junit-xml suites of ``result``: one per model x target worst first, then one per
    unanalysable and per ungated model (or one saying there was nothing to gate)."""
    suites = [_entry_suite(entry) for entry in result.ranked_entries]  # worst first
    suites.extend(_error_suite(error, result.allow_errors) for error in result.errors)
    suites.extend(_ungated_suite(item) for item in result.ungated)
    if not suites:
        suites.append(_empty_suite(result))
    elif result.notes:  # run notes on the first suite
        suites[0].stdout = _x("\n".join(result.notes), multiline=True)
    _add_rules_source(result, suites[0])
    return suites


def _entry_suite(entry: Entry) -> TestSuite:
    classname = _x(f"{entry.model} on {entry.target}")
    cases = [_verdict_case(verdict, classname) for verdict in entry.ranked_verdicts]
    if not cases:
        case = TestCase(_x("analysed"), classname=classname)
        case.stdout = _x(_no_rules_text(entry), multiline=True)
        cases.append(case)
    warnings = sum(1 for v in entry.verdicts if v.status == FAIL and v.severity != "error")
    return TestSuite(_x(f"{entry.model} [{entry.target}]"), cases,
                     properties=_properties(entry, warnings))


def _verdict_case(verdict: Verdict, classname: str) -> TestCase:
    case = TestCase(_x(verdict.rule_id), classname=classname)
    failing = verdict.failing
    if verdict.status == FAIL and verdict.severity == "error":
        case.add_failure_info(message=_x(_failure_message(verdict, failing)),
                              output=_details(verdict),
                              failure_type=_x(verdict.kind or "rule"))
    elif verdict.status == FAIL:
        case.stdout = f"warning (does not block the merge)\n{_details(verdict)}"
    elif verdict.status == WAIVED:
        case.add_skipped_info(message=_x(_waived_message(verdict)),
                              output=_details(verdict))
    return case


def _failure_message(verdict: Verdict, failing: Sequence[Finding]) -> str:
    """One sentence: model, target, rule, the worst finding (layer, value against the limit)
    and the remedy, as every report words it; then how many more places fail."""
    first = Blocker(verdict, failing[0] if failing else None)
    more = f" {len(failing) - 1} more place{'s' if len(failing) != 2 else ''} fail." \
        if len(failing) > 1 else ""
    return first.sentence() + more


_NO_REMEDY = "see the rule's description in the policy file"


def _waived_message(verdict: Verdict) -> str:
    reasons = sorted({(f.waiver_reason, f.waiver_expires) for f in verdict.findings
                      if f.status == WAIVED})
    parts = [f"{r or 'no reason given'}" + (f" (expires {e})" if e else "") for r, e in reasons]
    return f"waived: {'; '.join(parts) or verdict.summary or 'all findings waived'}"


def _details(verdict: Verdict) -> str:
    """Multi-line text: summary, every finding, the remedy; never empty, each line XML-safe.

    Each line is made safe on its own, so a newline inside a node name shows as
    ``\\n`` instead of starting a line that looks like another finding.
    """
    lines = [(f"{verdict.severity} rule {verdict.rule_id} ({verdict.kind}): "
              f"{verdict.summary or verdict.status}")]
    if verdict.description:
        lines.append(f"rule: {verdict.description}")
    ordered = [*verdict.failing, *(f for f in verdict.findings if f.status != FAIL)]
    for finding in ordered[:MAX_LISTED_FINDINGS]:
        line = f"- {verdict.text_of(finding) or _finding_text(finding)}"
        if finding.status == WAIVED:
            line += f" [waived: {finding.waiver_reason or 'no reason given'}"
            line += f", expires {finding.waiver_expires}]" if finding.waiver_expires else "]"
        lines.append(line)
    hidden = len(verdict.findings) - MAX_LISTED_FINDINGS
    if hidden > 0:
        lines.append(f"... and {hidden} more findings (see the JSON report)")
    lines.append(f"fix: {verdict.remedy or _NO_REMEDY}")
    return "\n".join(_x(line) for line in lines)


def _finding_text(finding: Finding) -> str:
    where = f"layer '{finding.layer}'" if finding.layer is not None else "model"
    return (f"{where}: {metrics.label(finding.metric)} "
            f"{metrics.fmt(finding.metric, finding.value)}, limit "
            f"{metrics.fmt(finding.metric, finding.limit)}")


def _properties(entry: Entry, warnings: int) -> dict[str, str]:
    props = {"model": _x(entry.model), "target": _x(entry.target),
             "status": entry.status_word, "warnings": str(warnings),
             "rules_applied": _x(", ".join(entry.rules_applied))}
    if entry.worst_layer is not None:
        props["worst_layer"] = _x(entry.worst_layer)
    if entry.head is None:
        props["model_removed"] = "true"
        return props
    props["precision"] = _x(entry.head.precision)
    for name in PROPERTY_METRICS:
        if name in entry.head.metrics:
            props[name] = _number(entry.head.metrics[name])
            if entry.diff is not None and name in entry.diff.totals:
                props[f"base_{name}"] = _number(entry.diff.totals[name][0])
    return props


def _no_rules_text(entry: Entry) -> str:
    if entry.head is None:
        return "the model was removed; no rules apply"
    return "profiled; no policy rule applies to this model x target"


def _error_suite(error: ModelError, allowed: bool) -> TestSuite:
    case = TestCase(_x("analyse"), classname=_x(f"{error.model} (unanalysable)"))
    note = " (let through by the policy's allow_unanalysable)" if allowed else ""
    message = error.message or "the model could not be analysed"
    case.add_error_info(message=_x(f"cannot analyse {error.model}: {message}{note}"),
                        output=_x(f"{error.model}: {message}\nfix the model or its inputs, "
                                  "then rerun roofgate", multiline=True),
                        error_type="unanalysable")
    return TestSuite(_x(f"{error.model} [unanalysable]"), [case],
                     properties={"model": _x(error.model), "status": "error"})


def _ungated_suite(item: UngatedModel) -> TestSuite:
    """A changed .onnx file no model group covers: a failure (``not-gated``) unless skipped."""
    case = TestCase(_x(NOT_GATED), classname=_x(f"{item.model} (not gated)"))
    if item.skipped:
        case.add_skipped_info(message=_x(f"{item.model}: {item.reason}"))
    else:
        case.add_failure_info(message=_x(f"{item.model} is not gated: {item.reason}"),
                              failure_type=NOT_GATED)
    return TestSuite(_x(f"{item.model} [{'skipped' if item.skipped else 'not gated'}]"), [case],
                     properties={"model": _x(item.model),
                                 "status": "skipped" if item.skipped else FAIL})


def _empty_suite(result: GateResult) -> TestSuite:
    case = TestCase("gate", classname="roofgate")
    case.stdout = _x("\n".join(result.notes) or "nothing to gate", multiline=True)
    return TestSuite("roofgate", [case], properties={"entries": "0"})


def _number(value: float | None) -> str:
    """A metric as a property value: ints exactly, floats to 12 significant digits, an
    unknown value as '?'."""
    if value is None:
        return "?"
    return str(value) if isinstance(value, int) else f"{value:.12g}"


def _x(text: str, *, multiline: bool = False) -> str:
    return xml_safe(text, multiline=multiline)


def _add_rules_source(result: GateResult, suite: TestSuite) -> None:
    """Where ``check`` took its rules from, and the rules section, on the first suite:
    properties for machines (``rules_from``, ``rules_changed``, ``rules_loosened``), and the
    statement and the changes first in its system-out."""
    source = result.rules_source
    if source is None:
        return
    suite.properties = {**(suite.properties or {}), "rules_from": source.side,
                        "rules_changed": str(len(source.changes)),
                        "rules_loosened": str(len(source.loosened))}
    lines = [source.statement]
    if source.changes:
        lines += [f"{source.heading}:"] + [f"- {line}" for line in source.changes]
    text = _x("\n".join(lines), multiline=True)
    suite.stdout = f"{text}\n{suite.stdout}" if suite.stdout else text


# --- the document text ---------------------------------------------------------------
# What junit-xml's to_xml_report_string(prettyprint=True) writes, without its serialize ->
# parse -> pretty-print round trip: identical bytes (tests/test_report_junit.py compares).

# The characters junit-xml deletes that reach its deletion still as characters: it
# serializes as US-ASCII first, so every other character is a reference by then, and so
# is a carriage return in an attribute value (ElementTree writes "&#13;"), which survives.
_JUNIT_DELETES = re.compile("[\x00-\x08\x0b-\x1f\x7f]")
_JUNIT_DELETES_IN_ATTRIBUTES = re.compile("[\x00-\x08\x0b\x0c\x0e-\x1f\x7f]")
# Characters no XML document may hold (junit-xml's round trip fails on them); xml_safe
# replaces them visibly, so finding one is a bug.
_NOT_XML = re.compile("[\ud800-\udfff\ufffe\uffff]")


def _document_text(suites: Sequence[TestSuite]) -> str:
    """The pretty-printed JUnit XML of ``suites`` (one ``testsuites`` root with totals)."""
    totals: defaultdict[str, int | float] = defaultdict(int)
    elements = []
    for suite in suites:
        element = suite.build_xml_doc()
        for key in ("disabled", "errors", "failures", "tests"):
            totals[key] += int(element.get(key, 0))
        totals["time"] += float(element.get("time", 0))
        elements.append(element)
    root = Element("testsuites", {key: str(value) for key, value in totals.items()})
    root.extend(elements)
    lines = ['<?xml version="1.0" ?>\n']
    _write_element(root, "", lines)
    # junit-xml's deletion in attribute values, over the whole text at once: the markup
    # holds none of these characters, and text was cleaned already (before deciding
    # whether an element is empty).
    text = _JUNIT_DELETES_IN_ATTRIBUTES.sub("", "".join(lines))
    bad = _NOT_XML.search(text)
    if bad:
        raise InternalError(f"JUnit XML would hold U+{ord(bad.group()):04X}, which XML "
                            "cannot carry (a string that missed xml_safe)")
    return text


def _write_element(element: Element, indent: str, out: list[str]) -> None:
    """One element as minidom's ``toprettyxml(indent="\\t")`` writes it: attributes in
    order, a lone text child inline, children one per line, no children ``<tag/>``."""
    attributes = "".join(f' {name}="{_escaped(value)}"' for name, value in element.items())
    text = _JUNIT_DELETES.sub("", element.text) if element.text else ""
    children = list(element)
    if not children:
        if text:
            out.append(f"{indent}<{element.tag}{attributes}>{_escaped(text)}</{element.tag}>\n")
        else:
            out.append(f"{indent}<{element.tag}{attributes}/>\n")
        return
    out.append(f"{indent}<{element.tag}{attributes}>\n")
    inner = indent + "\t"
    if text:  # text beside child elements: its own line (junit-xml never writes this)
        out.append(f"{inner}{_escaped(text)}\n")
    for child in children:
        _write_element(child, inner, out)
    out.append(f"{indent}</{element.tag}>\n")


def _escaped(value: str) -> str:
    """minidom's escaping, for attribute values and text alike."""
    if "&" in value:
        value = value.replace("&", "&amp;")
    if "<" in value:
        value = value.replace("<", "&lt;")
    if '"' in value:
        value = value.replace('"', "&quot;")
    if ">" in value:
        value = value.replace(">", "&gt;")
    return value
