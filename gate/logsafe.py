"""Text a CI runner would act on: the one place that knows the runners' log markers.

A CI runner scans every line a job prints. GitHub Actions runs ``::command::``
at the start of a line and still honours the legacy ``##[command]`` form
anywhere in a line (``##[error]``, ``##[add-mask]``, ``##[stop-commands]``);
Azure Pipelines acts on ``##vso[...]`` and TeamCity on ``##teamcity[...]``.
Model and file names are chosen by whoever wrote the model, so every printed
string they reach is passed through ``defuse_runner_markers`` (terminal text,
error lines, CSV) or ``defuse_json_markers`` (JSON text): the second ``#`` of
such a marker is shown as ``\\x23`` (``\\u0023`` in JSON, which reads back as
the same string), and a ``::`` that opens the text becomes ``\\x3a:``.
"""

from __future__ import annotations

import re

# "##[", "##vso[", "##teamcity[": the second "#" (a third "#" stays: "##\x23[" is inert).
_HASH_MARKER = re.compile(r"(?<=#)#(?=[A-Za-z]*\[)")
# "::" after nothing but blanks at the start of any line: where a workflow command starts.
_LEADING_COMMAND = re.compile(r"^([ \t]*):(?=:)", re.MULTILINE)


def defuse_runner_markers(text: str) -> str:
    """``text`` (one line or many) with no runner log marker left (``#\\x23[error]``)."""
    text = _HASH_MARKER.sub(lambda m: "\\x23", text)
    return _LEADING_COMMAND.sub(lambda m: m.group(1) + "\\x3a", text)


def defuse_json_markers(json_text: str) -> str:
    """JSON text with every ``##`` written ``#\\u0023`` (the same string to any JSON reader).

    A ``#`` can only occur inside a JSON string, so the document stays valid
    and reads back unchanged, yet no printed line holds ``##[``.
    """
    return json_text.replace("##", "#\\u0023")
