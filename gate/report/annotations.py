"""GitHub Actions file annotations: one workflow command per failure (``--annotations -``).

Each failing rule becomes ``::error file=<model>,title=<rule>::<summary>`` (or
``::warning`` for warning-severity rules), and each model that could not be
analysed an ``::error``. Printed on a step's stdout, GitHub shows them on the
pull request's changed files.

Escaping follows the workflow-command rules: in the message ``%``, CR and LF
become ``%25``, ``%0D``, ``%0A``; in properties ``:`` and ``,`` also become
``%3A`` and ``%2C``. So a hostile node name can neither end the command nor
start a second one. GitHub shows at most 10 errors and 10 warnings per step,
so at most ``MAX_PER_KIND - 1`` of each are printed individually and the rest
summed up in one last annotation pointing at the full report.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import TextIO

from gate.logsafe import defuse_runner_markers
from gate.report.text import shorten, visible
from gate.result import FAIL, NOT_GATED, GateResult, Verdict

MAX_PER_KIND = 10  # GitHub's per-step display limit for each of error and warning
MAX_MESSAGE_CHARS = 4000
# Controls other than CR and LF (which the escaping encodes): shown visibly, e.g. "\x1b".
_CONTROLS = re.compile("[\x00-\x09\x0b\x0c\x0e-\x1f\x7f-\x9f\u2028\u2029\ud800-\udfff]")


def escape_data(text: str) -> str:
    """Escape a workflow-command message (the part after ``::``)."""
    return text.replace("%", "%25").replace("\r", "%0D").replace("\n", "%0A")


def escape_property(text: str) -> str:
    """Escape a workflow-command property value (``file=``, ``title=``)."""
    return escape_data(text).replace(":", "%3A").replace(",", "%2C")


def command(kind: str, message: str, **properties: str) -> str:
    """One workflow-command line, e.g. ``::error file=a.onnx,title=t::message``.

    Terminal control characters (escape sequences) are made visible first; the
    message keeps its line breaks (as ``%0A``), properties are one line.
    """
    message = _visible(message)
    props = ",".join(f"{key}={escape_property(_visible(v))}" for key, v in properties.items())
    return f"::{kind} {props}::{escape_data(message)}" if props else f"::{kind}::{escape_data(message)}"


def _visible(text: str) -> str:
    """Controls shown visibly (``\\x1b``), runner markers defused (``#\\x23[``; gate/logsafe)."""
    return defuse_runner_markers(_CONTROLS.sub(lambda m: visible(m.group()), text))


@dataclass(frozen=True, slots=True)
class _Annotation:
    kind: str  # "error" or "warning"
    file: str
    title: str
    message: str


def collect_annotations(result: GateResult) -> list[_Annotation]:
    """Every annotation the result calls for: unanalysable models, then blocking rules, then
    warnings, in the result's worst-first order. A rule's annotation leads with its worst
    finding as one sentence, lists a few more places, and says the remedy once."""
    out = [_Annotation("error", e.model, "roofgate: model not analysed", e.message)
           for e in result.errors]
    out += [_Annotation("error", u.model, f"roofgate {NOT_GATED}", u.reason)
            for u in result.not_gated]
    for entry in result.ranked_entries:
        for verdict in entry.ranked_verdicts:
            if verdict.status == FAIL:
                out.append(_Annotation("error" if verdict.blocks_merge else "warning",
                                       entry.model,
                                       f"roofgate {verdict.rule_id} ({entry.target})",
                                       _message(verdict)))
    return sorted(out, key=lambda a: a.kind != "error")


def _message(verdict: Verdict) -> str:
    failing = verdict.failing
    lines = [verdict.text_of(f) for f in failing[:5]] or [verdict.summary]
    if len(failing) > 5:
        lines.append(f"... and {len(failing) - 5} more: "
                     + ", ".join(f.layer or "model" for f in failing[5:15]))
    if verdict.remedy:
        lines.append(f"Fix: {verdict.remedy}")
    return "\n".join(lines)


def render(result: GateResult) -> list[str]:
    """The workflow-command lines, capped per kind with a summarising last line."""
    lines: list[str] = []
    for kind in ("error", "warning"):
        items = [a for a in collect_annotations(result) if a.kind == kind]
        shown = items if len(items) <= MAX_PER_KIND else items[: MAX_PER_KIND - 1]
        for item in shown:
            lines.append(command(kind, shorten(item.message, MAX_MESSAGE_CHARS),
                                 file=item.file, title=shorten(item.title, 200)))
        hidden = items[len(shown):]
        if hidden:
            models = sorted({a.file for a in hidden})
            lines.append(command(
                kind, f"{len(hidden)} more roofgate {kind}s not shown here (GitHub shows "
                f"{MAX_PER_KIND} per step) in {len(models)} model(s): "
                f"{shorten(', '.join(models), 1000)}. See the job summary or the JUnit report.",
                title=f"roofgate: {len(hidden)} more {kind}s"))
    return lines


class AnnotationsReporter:
    name = "annotations"
    help = "Write GitHub Actions annotations (workflow commands) for failures"

    def write(self, result: GateResult, stream: TextIO) -> None:
        stream.writelines(line + "\n" for line in render(result))


REPORTER = AnnotationsReporter()
