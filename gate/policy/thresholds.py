"""The threshold arithmetic of every rule kind, as small pure functions.

Kept apart from messages and scoping so each comparison has its own
table-driven test (tests/test_policy_rules.py).
"""

from __future__ import annotations

# A worsening smaller than this share of the values compared is float noise, not a change.
_NOISE = 1e-9
# Limits are met by values equal to them within this relative tolerance: a share computed
# as 1 - 38/40 is 0.050000000000000044 in floating point, and 2 of 40 nodes must meet a 5%
# limit. Far below any difference a rule is meant to catch.
LIMIT_REL_TOL = 1e-9


def _slack(value: float, limit: float) -> float:
    return LIMIT_REL_TOL * max(abs(value), abs(limit))


def below_minimum(value: float, minimum: float) -> bool:
    """A minimum is met by a value equal to it (within ``LIMIT_REL_TOL``)."""
    return value < minimum - _slack(value, minimum)


def above_maximum(value: float, maximum: float) -> bool:
    """A maximum is met by a value equal to it (within ``LIMIT_REL_TOL``)."""
    return value > maximum + _slack(value, maximum)


def worsening(base: float, head: float, higher_is_better: bool) -> float:
    """How much worse ``head`` is than ``base`` (positive) or better (negative)."""
    return base - head if higher_is_better else head - base


def regression_exceeds(base: float, head: float, *, higher_is_better: bool,
                       max_pct: float | None, max_abs: float | None) -> bool:
    """Whether head regressed past the limits given (at least one must be given).

    With both limits the change must exceed *both*: the absolute limit is a
    noise floor so a layer going from 1 us to 2 us does not trip a 5% limit,
    and the relative limit keeps big layers from hiding behind it. A change
    from a baseline of zero exceeds any relative limit.
    """
    if max_pct is None and max_abs is None:
        raise ValueError("a regression check needs max_pct and/or max_abs")
    worse = worsening(base, head, higher_is_better)
    if worse <= _NOISE * max(abs(base), abs(head)) or worse <= 0:
        return False
    past_pct = max_pct is None or base == 0 or above_maximum(worse / abs(base) * 100.0, max_pct)
    past_abs = max_abs is None or above_maximum(worse, max_abs)
    return past_pct and past_abs


def regression_bound(base: float, *, higher_is_better: bool, max_pct: float | None,
                     max_abs: float | None) -> float:
    """The worst head value the limits allow (the limit reported in a regression finding)."""
    slacks = []
    if max_pct is not None:
        slacks.append(abs(base) * max_pct / 100.0)
    if max_abs is not None:
        slacks.append(max_abs)
    slack = max(slacks)  # exceeding requires passing every limit, so the loosest one binds
    return base - slack if higher_is_better else base + slack


def unmodelled_share(coverage_share: float) -> float:
    """The share a profile cannot see, from its coverage share (clamped to 0..1)."""
    return min(1.0, max(0.0, 1.0 - coverage_share))


def waiver_active(expires_iso: str, today_iso: str) -> bool:
    """A waiver holds through its expiry day and lapses the day after (ISO dates compare)."""
    return today_iso <= expires_iso
