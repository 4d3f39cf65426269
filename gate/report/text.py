"""Escaping and shortening of text for every reporter.

Numbers are written by ``gate.metrics`` (per metric) and ``gate.units`` (per
quantity), never here.

Escaping: node and model names come from the model file, i.e. from whoever
wrote it. They may hold markdown syntax, HTML, mentions, newlines and control
characters that XML 1.0 cannot carry. Each output context has one function
here (``md_escape``, ``html_escape``, ``xml_safe``, ``term_safe``); a reporter
runs every model-supplied string through the one for its context. Unsafe
characters are replaced *visibly* (``\\x0d``), never dropped, so a hostile
name stays readable and distinct.
"""

from __future__ import annotations

import html
import re

from gate.logsafe import defuse_runner_markers

# --- characters ----------------------------------------------------------------

# Characters XML 1.0 forbids, plus the ones it discourages (C1 controls, noncharacters),
# which junit-xml deletes silently; carriage return is legal XML but junit-xml deletes it too.
_XML_BAD = re.compile(
    "[\x00-\x08\x0b-\x1f\x7f-\x9f\ud800-\udfff\ufdd0-\ufdef\ufffe\uffff]"
    "|[\U0001fffe\U0001ffff\U0002fffe\U0002ffff\U0003fffe\U0003ffff\U0004fffe\U0004ffff"
    "\U0005fffe\U0005ffff\U0006fffe\U0006ffff\U0007fffe\U0007ffff\U0008fffe\U0008ffff"
    "\U0009fffe\U0009ffff\U000afffe\U000affff\U000bfffe\U000bffff\U000cfffe\U000cffff"
    "\U000dfffe\U000dffff\U000efffe\U000effff\U000ffffe\U000fffff\U0010fffe\U0010ffff]"
)
# Controls a terminal would act on (escape sequences, backspace, bell, ...).
_TERM_BAD = re.compile("[\x00-\x1f\x7f-\x9f\u2028\u2029\ud800-\udfff]")
_NAMED = {"\n": "\\n", "\r": "\\r", "\t": "\\t"}



def visible(char: str) -> str:
    """A readable stand-in for one unsafe character: ``\\n``, ``\\x1b``, ``\\ud800``."""
    if char in _NAMED:
        return _NAMED[char]
    code = ord(char)
    if code <= 0xFF:
        return f"\\x{code:02x}"
    return f"\\u{code:04x}" if code <= 0xFFFF else f"\\U{code:08x}"


def xml_safe(text: str, *, multiline: bool = False) -> str:
    """``text`` with every character XML (or junit-xml) would reject replaced visibly.

    Single-line values (names, attributes) also get newlines and tabs replaced,
    so a name can never forge a second line. ``multiline`` text keeps ``\\n``
    and tabs and turns ``\\r\\n`` into ``\\n``.
    """
    if multiline:
        text = text.replace("\r\n", "\n")
        return _XML_BAD.sub(lambda m: visible(m.group()), text)
    for char in "\n\t\u2028\u2029":
        text = text.replace(char, visible(char))
    return _XML_BAD.sub(lambda m: visible(m.group()), text)


def term_safe(text: str) -> str:
    """``text`` safe to print on a terminal and in a CI log: no escape sequences, one
    line, no runner log marker (``##[error]``, ``::`` at the start; see gate/logsafe)."""
    return defuse_runner_markers(_TERM_BAD.sub(lambda m: visible(m.group()), text))


def one_line(text: str) -> str:
    """Collapse all whitespace runs (newlines included) to single spaces."""
    return " ".join(text.split())


def shorten(text: str, max_chars: int) -> str:
    """``text`` cut to ``max_chars`` with an ellipsis when longer."""
    if len(text) <= max_chars:
        return text
    return text[: max(max_chars - 1, 0)] + "\u2026"


# --- markdown and HTML -------------------------------------------------------

# Backslash-escaped anywhere: characters that open inline markup, math or a table cell
# (GFM tables split on | before inline parsing, so even code spans need \|).
_MD_PUNCT = frozenset("\\`*_[]|~$")
# Backslash-escaped at the start only: block markers (heading, list, quote is an entity).
_MD_LEADING = frozenset("#-+=")
# HTML-encoded: no raw HTML survives; a zero-width space after @ stops mentions
# (GitHub resolves mentions on the rendered text, so an entity alone would not).
_MD_ENTITIES = {"&": "&amp;", "<": "&lt;", ">": "&gt;", '"': "&quot;", "@": "@&#8203;"}
# Also broken by a zero-width space: the starts of what GitHub turns into links by itself
# (bare URLs "https://", "www.", "GH-123"; "#123" is handled beside the other characters).
_ZERO_WIDTH = "&#8203;"
_HASH_DIGIT = re.compile("#(?=[0-9])")
# Every character md_escape replaces, and the marker of a "#123" break ("\x00").
_MD_TABLE = str.maketrans({**_MD_ENTITIES, **{char: "\\" + char for char in _MD_PUNCT},
                           "\x00": _ZERO_WIDTH})
_MD_AUTOLINK = re.compile(r"(?i)(?<![a-z0-9])(?:https?|ftp|mailto|xmpp)(?=:)"
                          r"|(?i:(?<![a-z0-9])www)(?=\.)|(?i:(?<![a-z0-9])gh)(?=-[0-9])")


def md_escape(text: str) -> str:
    """``text`` as literal characters in GitHub-flavoured markdown, safe in a table cell.

    No markup, link, raw HTML, mention, math or table break survives, nor an
    autolink (bare URL, ``www.``, ``#123``, ``GH-123``); newlines and control
    characters become visible escapes, so the text stays on one line.
    """
    text = term_safe(text)  # newlines -> "\n" text, escape sequences -> "\x1b"
    if "#" in text:  # "#123" would link an issue or pull request: mark where a break goes
        text = _HASH_DIGIT.sub("#\x00", text)  # no control character is left to clash
    escaped = text.translate(_MD_TABLE)  # one pass in C (a reporter's hottest loop once)
    if text[:1] in _MD_LEADING:
        escaped = "\\" + escaped
    return _MD_AUTOLINK.sub(lambda m: m.group() + _ZERO_WIDTH, escaped)


def md_code(text: str) -> str:
    """``text`` as an inline code span: any backtick run inside is outfenced; pipes escaped.

    Use for short identifiers (rule ids, op types) in running text; table cells
    should use ``md_escape`` (GFM keeps ``\\|`` literal inside code spans in tables).
    """
    text = term_safe(text).replace("|", "\\|")
    longest = max((len(run) for run in re.findall("`+", text)), default=0)
    fence = "`" * (longest + 1)
    pad = " " if text.startswith("`") or text.endswith("`") else ""
    return f"{fence}{pad}{text}{pad}{fence}"


def html_escape(text: str) -> str:
    """``text`` as literal characters in HTML (element text or a quoted attribute)."""
    return html.escape(term_safe(text), quote=True)
