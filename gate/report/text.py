"""Shared formatting and escaping for every reporter.

Formatting: numbers with their unit (bytes as B/KiB/MiB/GiB, shares as %,
seconds as ms, joules as mJ/uJ, counts with SI prefixes) and deltas between a
base and a head value, so every format writes the same figure the same way.
Micro is written ``u`` in every report, chart axes included (``TIME_UNITS``,
``ENERGY_UNITS``): plain ASCII survives every CI log, console and XML consumer,
and it is what target and policy files are written with (``2 us``).

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
import math
import re

from gate.logsafe import defuse_runner_markers
from gate.records import Metric

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

UNKNOWN = "?"  # how every text output prints an unknown figure (JSON: null)


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
_DIGITS = frozenset("0123456789")
_MD_AUTOLINK = re.compile(r"(?i)(?<![a-z0-9])(?:https?|ftp|mailto|xmpp)(?=:)"
                          r"|(?i:(?<![a-z0-9])www)(?=\.)|(?i:(?<![a-z0-9])gh)(?=-[0-9])")


def md_escape(text: str) -> str:
    """``text`` as literal characters in GitHub-flavoured markdown, safe in a table cell.

    No markup, link, raw HTML, mention, math or table break survives, nor an
    autolink (bare URL, ``www.``, ``#123``, ``GH-123``); newlines and control
    characters become visible escapes, so the text stays on one line.
    """
    text = term_safe(text)  # newlines -> "\n" text, escape sequences -> "\x1b"
    out = []
    for position, char in enumerate(text):
        if char in _MD_ENTITIES:
            out.append(_MD_ENTITIES[char])
        elif char in _MD_PUNCT or (position == 0 and char in _MD_LEADING):
            out.append("\\" + char)
        else:
            out.append(char)
        if char == "#" and text[position + 1:position + 2] in _DIGITS:
            out.append(_ZERO_WIDTH)  # "#123" would link an issue or pull request
    return _MD_AUTOLINK.sub(lambda m: m.group() + _ZERO_WIDTH, "".join(out))


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


# --- numbers -----------------------------------------------------------------

_BINARY_UNITS = ("B", "KiB", "MiB", "GiB", "TiB", "PiB")
# Decimal unit ladders (unit, size in base units), largest first, shared with the charts.
TIME_UNITS: tuple[tuple[str, float], ...] = (("s", 1.0), ("ms", 1e-3), ("us", 1e-6),
                                             ("ns", 1e-9))
ENERGY_UNITS: tuple[tuple[str, float], ...] = (("J", 1.0), ("mJ", 1e-3), ("uJ", 1e-6),
                                               ("nJ", 1e-9), ("pJ", 1e-12))
_SI_PREFIXES = ((1e12, "T"), (1e9, "G"), (1e6, "M"), (1e3, "k"))


def fmt_bytes(value: Metric) -> str:
    """Bytes with a binary prefix: ``512 B``, ``1.50 KiB``, ``3.2 MiB``."""
    if value is None:
        return UNKNOWN
    size = float(value)
    if abs(size) < 1024:
        return f"{int(size)} B" if size == int(size) else f"{size:.1f} B"
    for unit in _BINARY_UNITS[1:]:
        size /= 1024
        if abs(size) < 1024 or unit == _BINARY_UNITS[-1]:
            return f"{_three_digits(size)} {unit}"
    raise AssertionError("unreachable")


def fmt_count(value: Metric) -> str:
    """A count with an SI prefix: ``950``, ``1.23 M``, ``4.56 G``."""
    if value is None:
        return UNKNOWN
    number = float(value)
    for scale, prefix in _SI_PREFIXES:
        if abs(number) >= scale:
            return f"{_three_digits(number / scale)} {prefix}"
    return str(int(number)) if number == int(number) else _three_digits(number)


def fmt_percent(share: Metric, digits: int = 1) -> str:
    """A share in [0, 1] as a percentage: ``87.5%``."""
    if share is None:
        return UNKNOWN
    return f"{float(share) * 100:.{digits}f}%"


def fmt_ms(seconds: Metric) -> str:
    """Seconds as milliseconds with three significant digits: ``1.23 ms``, ``0.0456 ms``."""
    if seconds is None:
        return UNKNOWN
    ms = float(seconds) * 1e3
    if ms == 0:
        return "0 ms"
    return f"{_sig(ms, 3)} ms"


def fmt_joules(joules: Metric) -> str:
    """Energy with a fitting prefix: ``1.23 mJ``, ``45.6 uJ``."""
    if joules is None:
        return UNKNOWN
    value = float(joules)
    for unit, scale in ENERGY_UNITS:
        if abs(value) >= scale:
            return f"{_three_digits(value / scale)} {unit}"
    return "0 J" if value == 0 else f"{_three_digits(value / 1e-12)} pJ"


def fmt_metric(name: str, value: Metric) -> str:
    """Format ``value`` by the unit its metric ``name`` carries (records.py naming); an
    unknown value (None) is '?', never 0."""
    if value is None:
        return UNKNOWN
    if isinstance(value, float) and not math.isfinite(value):
        return str(value)
    if name.endswith("_bytes"):
        return fmt_bytes(value)
    if name.endswith("_share") or name == "utilization":
        return fmt_percent(value)
    if name.endswith("_per_s"):
        return f"{fmt_count(value)}/s"
    if name.endswith("_per_j"):
        return f"{fmt_count(value)}/J"
    if name.endswith("_s"):
        return fmt_ms(value)
    if name.endswith("_j"):
        return fmt_joules(value)
    if isinstance(value, int):
        return fmt_count(value)
    return _sig(float(value), 3)


def relative_change(base: Metric, head: Metric) -> float | None:
    """(head - base) / base, or None when base is zero (a change from nothing) or unknown."""
    if base is None or head is None:
        return None
    if base == 0:
        return None if head != 0 else 0.0
    return (float(head) - float(base)) / abs(float(base))


def fmt_delta(name: str, base: Metric, head: Metric) -> str:
    """The change from ``base`` to ``head`` of metric ``name``: ``+1.50 KiB (+3.0%)``.

    Shares change in percentage points (``-4.2 pp``); an unchanged value is ``=``;
    a change from zero has no percentage (``new``); with an unknown side it is ``?``.
    """
    if base is None or head is None:
        return UNKNOWN
    if _same(base, head):
        return "="
    if name.endswith("_share") or name == "utilization":
        return f"{(float(head) - float(base)) * 100:+.1f} pp"
    diff = head - base
    sign = "+" if diff > 0 else "-"
    absolute = f"{sign}{fmt_metric(name, abs(diff))}"
    ratio = relative_change(base, head)
    return f"{absolute} (new)" if ratio is None else f"{absolute} ({ratio * 100:+.1f}%)"


def fmt_change(name: str, base: Metric, head: Metric) -> str:
    """The compact change from ``base`` to ``head``: ``+3.0%``, ``-4.2 pp`` for shares,
    ``+1.50 KiB`` from zero, ``=`` when equal, ``?`` when a side is unknown."""
    if base is None or head is None:
        return UNKNOWN
    if _same(base, head):
        return "="
    if name.endswith("_share") or name == "utilization":
        return f"{(float(head) - float(base)) * 100:+.1f} pp"
    ratio = relative_change(base, head)
    if ratio is None:
        sign = "+" if head > base else "-"
        return f"{sign}{fmt_metric(name, abs(head - base))}"
    return f"{ratio * 100:+.1f}%"


def _same(base: Metric, head: Metric) -> bool:
    """Equal, or floats equal up to the rounding a baseline snapshot applies (12 digits);
    an unknown value is the same as nothing (two unknowns are not 'unchanged')."""
    if base is None or head is None:
        return False
    return base == head or math.isclose(float(base), float(head), rel_tol=1e-9)


def _three_digits(value: float) -> str:
    """Three significant digits, fixed-point: 1.23, 12.3, 123."""
    magnitude = abs(value)
    if magnitude >= 100:
        return f"{value:.0f}"
    if magnitude >= 10:
        return f"{value:.1f}"
    return f"{value:.2f}"


def _sig(value: float, digits: int) -> str:
    """``value`` to ``digits`` significant digits without exponent for everyday sizes."""
    if value == 0:
        return "0"
    text = f"{value:.{digits}g}"
    if "e" in text and 1e-6 <= abs(value) < 1e15:
        decimals = max(digits - 1 - math.floor(math.log10(abs(value))), 0)
        text = f"{value:.{decimals}f}"
    return text
