"""JSON results for machines: the whole ``GateResult``, versioned.

The document is ``gate.result.result_to_dict`` wrapped with a format name and
version, written deterministically by ``gate.jsontext.canonical_json`` as baseline
snapshots are (sorted keys, floats rounded to 12 significant digits, indent 2 with
one layer per line: every layer, layer change and finding on one line), so the
same result always gives the same bytes. The reporter streams the text in pieces
(``canonical_json_pieces``). ``read_result`` reads it back into a ``GateResult``
and reads files of the earlier layout alike (the layout is whitespace only, so
it has no version of its own).

Layout::

    {"format": "roofgate-result", "version": 3, "exit_code": 0|1|2,
     "summary": {status, counts, blocking: [sentences], entries: [{model, target,
                 status, worst_layer}]},
     "result": {command, policies, allow_errors, notes, errors, ungated, model_counts,
                entries: [...]}}

``summary`` repeats what the result object derives (the words and counts every
report shows), for readers that want the verdict without walking the entries;
``read_result`` ignores it.

Version history (bump ``RESULT_VERSION`` on any change a reader must know about,
and add a line here and in docs/reports.md):

  1  first version.
  2  a metric may be null (unknown, never 0); result.ungated (.onnx files no model group
     covers: model, reason, skipped), result.model_counts (seen, gated, not_gated,
     skipped) and entries[].rules_applied. Version 1 files read unchanged.
  3  findings carry ``headline`` (the sentence without the remedy); the document
     carries ``summary`` (status, counts, blocking sentences, entries worst first).
"""

from __future__ import annotations

from dataclasses import asdict
from functools import partial
from typing import Any, TextIO

from gate.errors import InputError
from gate.gcpause import cyclic_gc_paused
from gate.jsontext import (
    canonical_json,
    canonical_json_pieces,
    canonical_json_share,
    even_shares,
)
from gate.outfile import Writer
from gate.result import GateResult, blocking_sentences, result_from_dict, result_to_dict
from gate.snapshot import load_versioned_json

RESULT_FORMAT = "roofgate-result"
RESULT_VERSION = 3


class JsonReporter:
    name = "json"
    help = "Write the full result as versioned JSON to PATH"

    def write(self, result: GateResult, stream: TextIO) -> None:
        with cyclic_gc_paused():
            document = result_document(result)
        stream.writelines(canonical_json_pieces(document))

    def write_parts(self, result: GateResult, parts: int) -> list[Writer]:
        """Writers of up to ``parts`` consecutive parts of the same text, cut between
        entries; each builds the document of its share of the entries only."""
        shares = even_shares(len(result.entries), parts)
        if len(shares) < 2:
            return [partial(self.write, result)]
        return [partial(_write_share, result, share, k == 0, k == len(shares) - 1)
                for k, share in enumerate(shares)]


def _write_share(result: GateResult, share: range, first: bool, last: bool,
                 stream: TextIO) -> None:
    with cyclic_gc_paused():
        document = result_document(result, share)
    stream.writelines(canonical_json_share(document, document["result"]["entries"], share,
                                           first=first, last=last))


REPORTER = JsonReporter()


def result_document(result: GateResult, share: range | None = None) -> dict[str, Any]:
    """The JSON-ready document of ``result`` (with ``share``: only those entries, the
    others None, for ``canonical_json_share``)."""
    return {"format": RESULT_FORMAT, "version": RESULT_VERSION, "exit_code": result.exit_code,
            "summary": summary_dict(result), "result": result_to_dict(result, share)}


def summary_dict(result: GateResult) -> dict[str, Any]:
    """The derived verdict: status word, counts, blocking sentences, entries worst first."""
    return {
        "status": result.status_word,
        "counts": asdict(result.counts),
        "blocking": blocking_sentences(result),
        "entries": [{"model": e.model, "target": e.target, "status": e.status_word,
                     "worst_layer": e.worst_layer} for e in result.ranked_entries],
    }


def render(result: GateResult) -> str:
    return canonical_json(result_document(result))


def loads_result(text: str, path: str = "<result>") -> GateResult:
    """Parse a JSON result document (``path`` only names it in messages)."""
    with cyclic_gc_paused():  # parsing builds no cycles; a large result read twice as fast
        return _parse_result(text, path)


def _parse_result(text: str, path: str) -> GateResult:
    data = load_versioned_json(text, path, "result", RESULT_FORMAT, RESULT_VERSION,
                               remedy="rerun roofgate with this version to write it again", oldest_version=1)
    try:
        return result_from_dict(data["result"])
    except (KeyError, TypeError, ValueError, AttributeError) as exc:
        raise InputError(f"damaged roofgate result ({type(exc).__name__}: {exc})", path) from None


def read_result(path: str) -> GateResult:
    try:
        with open(path, encoding="utf-8") as stream:
            text = stream.read()
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot read the result file ({exc})", path) from None
    return loads_result(text, path)
