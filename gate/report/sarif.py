"""SARIF 2.1.0 log (``--sarif PATH``): one result per failed rule, for code-scanning uploads.

Follows the OASIS SARIF 2.1.0 standard (Errata 01); the test suite validates
every log against the standard's JSON schema (vendored in tests/schemas/).

- One ``reportingDescriptor`` per rule id seen in the run (id, short and full
  description, help text naming the remedy, default level from its severity).
- One ``result`` per failed verdict (a rule on one model x target), level
  ``error`` or ``warning`` from the rule severity, located at the model file
  (repository-relative, under ``%SRCROOT%``; line 1, since code scanning
  needs a line and the file is binary), with the offending layers as
  logical locations. A stable ``partialFingerprints`` entry (rule, model,
  target) lets a code-scanning service track the alert across runs.
- Waived verdicts appear as results with an accepted external suppression, so a
  scanner shows them as dismissed rather than open.
- A model that could not be analysed is a result of the reserved rule
  ``roofgate/model-not-analysed`` and a tool execution notification.

Only formats the ``GateResult``; JSON escaping makes any model-supplied string safe.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Sequence
from typing import Any, TextIO
from urllib.parse import quote

from gate import __version__
from gate.logsafe import defuse_json_markers
from gate.report.text import one_line, shorten, term_safe
from gate.result import (
    FAIL,
    NOT_GATED,
    WAIVED,
    Blocker,
    Entry,
    Finding,
    GateResult,
    UngatedModel,
    Verdict,
    not_gated_sentence,
)

SARIF_VERSION = "2.1.0"
SARIF_SCHEMA_URI = (
    "https://docs.oasis-open.org/sarif/sarif/v2.1.0/errata01/os/schemas/sarif-schema-2.1.0.json"
)
SRCROOT = "%SRCROOT%"
MODEL_ERROR_RULE = "roofgate/model-not-analysed"
FINGERPRINT_KEY = "roofgateVerdict/v1"
MAX_LOCATIONS = 20  # logical locations (layers) listed per result


class SarifReporter:
    """``--sarif PATH``: failed rules as a SARIF 2.1.0 log."""

    name = "sarif"
    help = "Write failed rules as a SARIF 2.1.0 log for code-scanning uploads"

    def write(self, result: GateResult, stream: TextIO) -> None:
        stream.write(defuse_json_markers(json.dumps(sarif_log(result), indent=2,
                                                    ensure_ascii=True, allow_nan=False)))
        stream.write("\n")


REPORTER = SarifReporter()


def sarif_level(severity: str) -> str:
    """SARIF level of a rule severity: error -> error, warning -> warning, else note."""
    return severity if severity in ("error", "warning") else "note"


def artifact_uri(model_path: str) -> str:
    """The model path as a relative URI reference (forward slashes, percent-encoded)."""
    return quote(model_path.replace("\\", "/").removeprefix("./"), safe="/-._~")


def sarif_log(result: GateResult) -> dict[str, Any]:
    """The whole log as JSON-ready data."""
    verdicts = [v for e in result.ranked_entries for v in e.ranked_verdicts]
    rules = _rule_descriptors(verdicts, with_model_error=bool(result.errors),
                              with_not_gated=bool(result.not_gated))
    index = {rule["id"]: i for i, rule in enumerate(rules)}
    run: dict[str, Any] = {
        "tool": {"driver": {
            "name": "roofgate", "version": __version__, "semanticVersion": __version__,
            "rules": rules,
        }},
        "originalUriBaseIds": {SRCROOT: {"description": {
            "text": "The repository root; model paths are relative to it."}}},
        "invocations": [_invocation(result)],
        "results": _results(result, index),
        "properties": {"command": result.command, "policies": list(result.policies),
                       "exitCode": result.exit_code, "modelCounts": _model_counts(result),
                       "modelTargets": [_applied(e) for e in result.ranked_entries],
                       **_rules_source_props(result)},
    }
    return {"$schema": SARIF_SCHEMA_URI, "version": SARIF_VERSION, "runs": [run]}


def _results(result: GateResult, index: dict[str, int]) -> list[dict[str, Any]]:
    """What blocked first, like every report: blocking rules (worst entry first), changed
    models outside every model group, unanalysable models; then warnings, then waived."""
    blocking, warnings, waived = [], [], []
    for entry in result.ranked_entries:
        for verdict in entry.ranked_verdicts:
            if verdict.blocks_merge:
                blockers = [b for b in entry.blocking if b.verdict is verdict]
                blocking.append(_result(verdict, index[verdict.rule_id], blockers))
            elif verdict.status == FAIL:
                warnings.append(_result(verdict, index[verdict.rule_id]))
            elif verdict.status == WAIVED:
                waived.append(_result(verdict, index[verdict.rule_id]))
    not_gated = [_not_gated_result(item, index[NOT_GATED]) for item in result.not_gated]
    errors = [_error_result(e.model, e.message, index[MODEL_ERROR_RULE]) for e in result.errors]
    return blocking + not_gated + errors + warnings + waived


def _model_counts(result: GateResult) -> dict[str, int]:
    """Model files seen, gated, not gated and skipped (SARIF property names are camelCase)."""
    return {"".join(w if k == 0 else w.capitalize() for k, w in enumerate(key.split("_"))): n
            for key, n in result.model_counts.items()}


def _applied(entry: Entry) -> dict[str, Any]:
    """Which rules judged one model x target (passing ones included), and its status."""
    return {"model": term_safe(entry.model), "target": term_safe(entry.target),
            "status": entry.status_word,
            "rulesApplied": [term_safe(rule) for rule in entry.rules_applied]}


def _rule_descriptors(verdicts: Sequence[Verdict], *, with_model_error: bool,
                      with_not_gated: bool = False) -> list[dict[str, Any]]:
    """One descriptor per rule id (first occurrence wins), sorted by id, then the built-in
    rules the run needs."""
    first: dict[str, Verdict] = {}
    for verdict in verdicts:
        first.setdefault(verdict.rule_id, verdict)
    rules = [_descriptor(first[rule_id]) for rule_id in sorted(first)]
    if with_model_error:
        rules.append({
            "id": MODEL_ERROR_RULE, "name": "ModelNotAnalysed",
            "shortDescription": {"text": "The model file could not be analysed."},
            "fullDescription": {"text": "roofgate could not load or profile the model file, so "
                                        "no rule could be checked; the gate fails closed."},
            "help": {"text": "Remedy: fix the problem named in the message (unreadable or "
                             "invalid ONNX file, unsupported input shapes), then rerun."},
            "defaultConfiguration": {"level": "error"},
        })
    if with_not_gated:
        rules.append(NOT_GATED_DESCRIPTOR)
    return rules


NOT_GATED_DESCRIPTOR: dict[str, Any] = {
    "id": NOT_GATED, "name": "NotGated",
    "shortDescription": {"text": "A changed model file is outside every model group."},
    "fullDescription": {"text": "No model group of roofgate.yaml covers this changed .onnx "
                                "file, so no rule checked it; the gate fails rather than "
                                "pass it unchecked."},
    "help": {"text": "Remedy: add a model group whose paths glob covers the file, or list "
                     "it under ungated: in roofgate.yaml if it is deliberately not gated."},
    "defaultConfiguration": {"level": "error"},
}


def _descriptor(verdict: Verdict) -> dict[str, Any]:
    description = one_line(verdict.description) or verdict.rule_id
    return {
        "id": verdict.rule_id,
        "name": _pascal(verdict.kind) or "Rule",
        "shortDescription": {"text": shorten(_first_sentence(description), 200)},
        "fullDescription": {"text": f"{description} (rule kind: {verdict.kind}, "
                                    f"severity: {verdict.severity})"},
        "help": {"text": f"Remedy: {one_line(verdict.remedy) or 'see the rule description.'}"},
        "defaultConfiguration": {"level": sarif_level(verdict.severity)},
        "properties": {"kind": verdict.kind, "tags": ["roofgate", verdict.kind]},
    }


def _result(verdict: Verdict, rule_index: int,
            blockers: Sequence[Blocker] = ()) -> dict[str, Any]:
    failing = list(verdict.failing if verdict.status == FAIL else verdict.findings)
    lines = _blocking_lines(verdict, blockers) if blockers else _finding_lines(verdict, failing)
    out: dict[str, Any] = {
        "ruleId": verdict.rule_id,
        "ruleIndex": rule_index,
        "kind": "fail",
        "level": sarif_level(verdict.severity),
        "message": {"text": term_safe_lines(lines)},
        "locations": [_location(verdict.model, failing)],
        "partialFingerprints": {FINGERPRINT_KEY: _fingerprint(verdict)},
        "properties": {"target": verdict.target, "ruleKind": verdict.kind,
                       "findings": [_finding_props(f) for f in failing[:MAX_LOCATIONS]]},
    }
    if verdict.status == WAIVED:
        out["suppressions"] = [{
            "kind": "external", "status": "accepted",
            "justification": "; ".join(sorted({term_safe(f"{f.waiver_reason} (until "
                                                         f"{f.waiver_expires or 'no date'})")
                                               for f in verdict.findings})) or "waived",
        }]
    return out


def _blocking_lines(verdict: Verdict, blockers: Sequence[Blocker]) -> list[str]:
    """A blocking rule: the sentences every report leads with (the first one, which names
    the remedy, is what a code-scanning service shows as the alert's title), then its
    summary."""
    lines = [b.sentence() for b in blockers[:MAX_LOCATIONS]]
    if len(blockers) > MAX_LOCATIONS:
        lines.append(f"... and {len(blockers) - MAX_LOCATIONS} more")
    return lines + [f"Summary: {verdict.summary}."]


def _finding_lines(verdict: Verdict, findings: Sequence[Finding]) -> list[str]:
    lines = [f"{verdict.model} on {verdict.target}: {verdict.summary}."]
    lines += [f"- {verdict.text_of(f)}" for f in findings[:MAX_LOCATIONS]]
    if len(findings) > MAX_LOCATIONS:
        lines.append(f"- ... and {len(findings) - MAX_LOCATIONS} more")
    if verdict.remedy:
        lines.append(f"Remedy: {verdict.remedy}")
    return lines


def term_safe_lines(lines: Sequence[str]) -> str:
    """Message text: each line made safe (no control characters), joined by newlines."""
    return "\n".join(term_safe(line) for line in lines)


def _location(model: str, findings: Sequence[Finding]) -> dict[str, Any]:
    # Code scanning anchors an alert on a line; the model file is binary, so line 1 stands
    # for the file as a whole (the layers are named in the logical locations).
    location: dict[str, Any] = {"physicalLocation": {
        "artifactLocation": {"uri": artifact_uri(model), "uriBaseId": SRCROOT},
        "region": {"startLine": 1}}}
    layers = sorted({f.layer for f in findings if f.layer is not None})
    if layers:
        location["logicalLocations"] = [
            {"name": term_safe(layer), "kind": "layer"} for layer in layers[:MAX_LOCATIONS]]
    return location


def _finding_props(finding: Finding) -> dict[str, Any]:
    return {"layer": None if finding.layer is None else term_safe(finding.layer),
            "metric": finding.metric, "value": finding.value, "limit": finding.limit}


def _fingerprint(verdict: Verdict) -> str:
    key = f"{verdict.rule_id}\x1f{verdict.model}\x1f{verdict.target}"
    return hashlib.sha256(key.encode("utf-8", "surrogatepass")).hexdigest()[:32]


def _error_result(model: str, message: str, rule_index: int) -> dict[str, Any]:
    return {
        "ruleId": MODEL_ERROR_RULE, "ruleIndex": rule_index, "kind": "fail", "level": "error",
        "message": {"text": term_safe(f"{model}: {message}")},
        "locations": [_location(model, ())],
        "partialFingerprints": {FINGERPRINT_KEY: hashlib.sha256(
            f"{MODEL_ERROR_RULE}\x1f{model}".encode("utf-8", "surrogatepass")).hexdigest()[:32]},
    }


def _not_gated_result(item: UngatedModel, rule_index: int) -> dict[str, Any]:
    return {
        "ruleId": NOT_GATED, "ruleIndex": rule_index, "kind": "fail", "level": "error",
        "message": {"text": term_safe(not_gated_sentence(item))},
        "locations": [_location(item.model, ())],
        "partialFingerprints": {FINGERPRINT_KEY: hashlib.sha256(
            f"{NOT_GATED}\x1f{item.model}".encode("utf-8", "surrogatepass")).hexdigest()[:32]},
    }


def _ungated_notifications(result: GateResult) -> list[dict[str, Any]]:
    """Every .onnx file no model group covers: an error when it blocks (not gated), a note
    when skipped on purpose (nothing is skipped without a word)."""
    return [{"level": "note" if item.skipped else "error",
             "message": {"text": term_safe(f"{item.model}: skipped: {item.reason}." if item.skipped
                                           else not_gated_sentence(item))},
             "locations": [_location(item.model, ())]} for item in result.ungated]


def _invocation(result: GateResult) -> dict[str, Any]:
    notes = _rules_source_notifications(result)
    notes += [{"level": "note", "message": {"text": term_safe(note)}} for note in result.notes]
    notes += _ungated_notifications(result)
    notes += [{"level": "error", "message": {"text": term_safe(f"{e.model}: {e.message}")},
               "locations": [_location(e.model, ())]} for e in result.errors]
    invocation: dict[str, Any] = {
        # Exit code 2 (a model could not be analysed) is an incomplete analysis, not a crash.
        "executionSuccessful": not (result.errors and not result.allow_errors),
        "exitCode": result.exit_code,
    }
    if notes:
        invocation["toolExecutionNotifications"] = notes
    return invocation


def _first_sentence(text: str) -> str:
    end = text.find(". ")
    return text if end < 0 else text[: end + 1]


def _pascal(kind: str) -> str:
    return "".join(part[:1].upper() + part[1:] for part in kind.replace("-", "_").split("_") if part)


def _rules_source_props(result: GateResult) -> dict[str, Any]:
    """Run properties: where ``check`` took its rules from and what the pull request changes."""
    source = result.rules_source
    if source is None:
        return {}
    return {"rulesSource": {"side": source.side, "statement": term_safe(source.statement),
                            "changes": [term_safe(line) for line in source.changes],
                            "loosened": [term_safe(line) for line in source.loosened]}}


def _rules_source_notifications(result: GateResult) -> list[dict[str, Any]]:
    """The statement, then one notification per rule change (a warning when it loosens)."""
    source = result.rules_source
    if source is None:
        return []
    out: list[dict[str, Any]] = [{"level": "warning" if source.from_head else "note",
                                  "message": {"text": term_safe(source.statement)}}]
    out += [{"level": "warning" if line in source.loosened else "note",
             "message": {"text": term_safe(f"{source.heading}: {line}")}}
            for line in source.changes]
    return out
