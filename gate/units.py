"""One formatter per kind of quantity, for every report, CLI table and policy message.

Bytes take binary prefixes (``1.50 KiB``), counts and rates SI prefixes
(``4.10 TFLOP/s``), time and energy a decimal ladder (``1.23 ms``, ``45.6 uJ``),
shares a percentage (``87.5%``) and changes of a share percentage points
(``-4.2 pp``). Three significant digits throughout.

Rounding happens *before* the unit is chosen, so a value that rounds up to the
next unit is written in it: 999.95 is ``1.00 k`` (never ``1000 k``), 1023.95
KiB is ``1.00 MiB`` (never ``1024 KiB``), 999.96 nJ is ``1.00 uJ``. A value that
rounds to zero is written without a sign (never ``-0.0 pp``). An unknown figure
(``None``) is ``?`` everywhere, and so is NaN; infinities are ``inf``/``-inf``.

The formatters are memoised (``lru_cache``, typed, so ``1`` and ``1.0`` and ``True`` stay
apart): a table of 100,000 layers repeats the same few values, and the output depends
on the value alone.

Micro is written ``u``: plain ASCII survives every CI log, console and XML
consumer, and it is what target and policy files are written with (``2 us``).

This module imports nothing from roofgate: it sits below the metric catalogue
(``gate.metrics``), the policy and the reporters.
"""

from __future__ import annotations

import math
from functools import lru_cache

UNKNOWN = "?"

Number = int | float

_CACHED_VALUES = 1 << 14  # distinct values remembered per formatter

# Ladders of (unit, size in base units), largest first.
BINARY_BYTES: tuple[tuple[str, float], ...] = (
    ("PiB", 1024.0 ** 5), ("TiB", 1024.0 ** 4), ("GiB", 1024.0 ** 3), ("MiB", 1024.0 ** 2),
    ("KiB", 1024.0), ("B", 1.0))
SI_PREFIXES: tuple[tuple[str, float], ...] = (
    ("P", 1e15), ("T", 1e12), ("G", 1e9), ("M", 1e6), ("k", 1e3), ("", 1.0))
TIME_UNITS: tuple[tuple[str, float], ...] = (
    ("s", 1.0), ("ms", 1e-3), ("us", 1e-6), ("ns", 1e-9), ("ps", 1e-12))
ENERGY_UNITS: tuple[tuple[str, float], ...] = (
    ("J", 1.0), ("mJ", 1e-3), ("uJ", 1e-6), ("nJ", 1e-9), ("pJ", 1e-12), ("fJ", 1e-15))


def three_digits(value: float) -> str:
    """Three significant digits in fixed point: ``1.23``, ``12.3``, ``123``, ``1234``."""
    magnitude = abs(value)
    if magnitude >= 99.95:
        text = f"{value:.0f}"
    elif magnitude >= 9.995:
        text = f"{value:.1f}"
    else:
        text = f"{value:.2f}"
    return no_negative_zero(text)


def no_negative_zero(text: str) -> str:
    """``text`` without a leading minus when every digit in it is zero (``-0.0`` -> ``0.0``)."""
    if text.startswith("-") and not any(c in "123456789" for c in text):
        return text[1:]
    return text


def _special(value: Number | None) -> str | None:
    """The text of a value that has no magnitude to scale: unknown, NaN or infinite."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return UNKNOWN
    if isinstance(value, float) and math.isinf(value):
        return "inf" if value > 0 else "-inf"
    return None


def scaled(value: Number | None, ladder: tuple[tuple[str, float], ...], *, step: float,
           unit_suffix: str = "", zero: str = "0") -> str:
    """``value`` in the largest unit of ``ladder`` it reaches *after* rounding.

    ``step`` is the ratio between neighbouring units (1000 or 1024); a value
    whose three-digit rounding reaches it moves up one unit.
    """
    special = _special(value)
    if special is not None:
        return special
    assert value is not None
    if value == 0:
        return zero
    magnitude = abs(float(value))
    index = next((i for i, (_, size) in enumerate(ladder) if magnitude >= size), None)
    if index is None:  # below the smallest unit: significant digits, not a false 0.00
        unit, size = ladder[-1]
        return _join(no_negative_zero(f"{float(value) / size:.3g}"), unit + unit_suffix)
    unit, size = ladder[index]
    text = three_digits(float(value) / size)
    if abs(float(text)) >= step and index > 0:  # rounded up into the next unit
        unit, size = ladder[index - 1]
        text = three_digits(float(value) / size)
    return _join(text, unit + unit_suffix)


def _join(number: str, unit: str) -> str:
    return f"{number} {unit}" if unit else number


@lru_cache(maxsize=_CACHED_VALUES, typed=True)
def fmt_bytes(value: Number | None) -> str:
    """Bytes with a binary prefix: ``512 B``, ``1.50 KiB``, ``5.06 MiB``."""
    special = _special(value)
    if special is not None:
        return special
    assert value is not None
    if abs(value) < 1024 and float(value).is_integer():
        return f"{int(value)} B"
    return scaled(value, BINARY_BYTES, step=1024, zero="0 B")


@lru_cache(maxsize=_CACHED_VALUES, typed=True)
def fmt_count(value: Number | None, unit: str = "") -> str:
    """A count or rate with an SI prefix: ``950``, ``1.23 M``, ``2.05 TFLOP/s``.

    Whole numbers below 1000 are written exactly (``768``, ``768 FLOP``).
    """
    special = _special(value)
    if special is not None:
        return special
    assert value is not None
    if abs(value) < 1000 and float(value).is_integer():
        return _join(str(int(value)), unit)
    return scaled(value, SI_PREFIXES, step=1000, unit_suffix=unit,
                  zero=_join("0", unit))


@lru_cache(maxsize=_CACHED_VALUES, typed=True)
def fmt_seconds(value: Number | None) -> str:
    """Time on a decimal ladder: ``2.41 ms``, ``9.25 us``, ``1.20 s``."""
    return scaled(value, TIME_UNITS, step=1000, zero="0 s")


@lru_cache(maxsize=_CACHED_VALUES, typed=True)
def fmt_joules(value: Number | None) -> str:
    """Energy on a decimal ladder: ``1.15 mJ``, ``471 uJ``."""
    return scaled(value, ENERGY_UNITS, step=1000, zero="0 J")


@lru_cache(maxsize=_CACHED_VALUES, typed=True)
def fmt_share(value: Number | None) -> str:
    """A share in [0, 1] as a percentage with one decimal: ``87.5%``.

    A share that is not zero but rounds to it reads ``<0.1%`` (never a false ``0.0%``).
    """
    special = _special(value)
    if special is not None:
        return special
    assert value is not None
    percent = float(value) * 100
    if percent != 0 and abs(percent) < 0.05:
        return "<0.1%" if percent > 0 else "-<0.1%"
    return no_negative_zero(f"{percent:.1f}") + "%"


@lru_cache(maxsize=_CACHED_VALUES, typed=True)
def fmt_points(delta_share: Number | None) -> str:
    """A change of a share in signed percentage points: ``-4.2 pp``, ``+0.04 pp``."""
    special = _special(delta_share)
    if special is not None:
        return special
    assert delta_share is not None
    return _signed(float(delta_share) * 100, "0 pp", " pp")


@lru_cache(maxsize=_CACHED_VALUES, typed=True)
def fmt_ratio_change(ratio: Number | None) -> str:
    """A relative change (0.774 = +77.4%) with its sign: ``+77.4%``, ``-3.0%``, ``+3100%``."""
    special = _special(ratio)
    if special is not None:
        return special
    assert ratio is not None
    return _signed(float(ratio) * 100, "0%", "%")


def _signed(amount: float, zero: str, unit: str) -> str:
    """A signed change in percent or points: one decimal, none from 100 up, two below 0.1,
    and ``+<0.01`` for a change too small for that (never a signed zero)."""
    if amount == 0:
        return zero
    magnitude = abs(amount)
    if magnitude >= 99.95:
        return f"{amount:+.0f}{unit}"
    if magnitude >= 0.095:
        return f"{amount:+.1f}{unit}"
    if magnitude >= 0.005:
        return f"{amount:+.2f}{unit}"
    return ("+" if amount > 0 else "-") + "<0.01" + unit


@lru_cache(maxsize=_CACHED_VALUES, typed=True)
def fmt_plain(value: Number | None) -> str:
    """A number without a unit, three significant digits (``0.123``, ``45.6``, ``1.20 k``)."""
    special = _special(value)
    if special is not None:
        return special
    assert value is not None
    if isinstance(value, int) or abs(value) >= 1:
        return fmt_count(value)
    return no_negative_zero(f"{value:.3g}")
