"""The benchmark table: one row per figure, its goal beside it, met or missed said plainly."""

from __future__ import annotations

import operator
from dataclasses import dataclass

from measure import Series

_COMPARE = {"<=": operator.le, ">=": operator.ge, "<": operator.lt, ">": operator.gt}


@dataclass(frozen=True)
class Goal:
    """``value OP limit`` (e.g. ratio <= 0.8), and the wording shown in the table."""

    op: str
    limit: float
    text: str

    def verdict(self, value: float | None, *, at_least: bool = False) -> str:
        """'met' or 'missed'; ``value`` None means not measured. ``at_least`` says the true
        value is at least ``value`` (a run stopped at its time limit)."""
        if value is None:
            return "not measured"
        if at_least and self.op in ("<=", "<"):
            return "missed" if not _COMPARE[self.op](value, self.limit) else "unknown"
        return "met" if _COMPARE[self.op](value, self.limit) else "missed"


@dataclass(frozen=True)
class Row:
    case: str
    what: str
    measured: str
    ratio: str
    goal: str = "-"
    verdict: str = "-"

    def markdown(self) -> str:
        verdict = f"**{self.verdict}**" if self.verdict == "missed" else self.verdict
        cells = (self.case, self.what, self.measured, self.ratio, self.goal, verdict)
        return "| " + " | ".join(cell.replace("|", "\\|") for cell in cells) + " |"


HEADER = ("| # | measurement | measured (absolute, medians) | ratio | goal | verdict |\n"
          "|---|---|---|---|---|---|")


def seconds(value: float | None, limit: float | None = None) -> str:
    if value is None:
        return f"> {limit:.0f} s (stopped)" if limit else "stopped"
    return f"{value:.2f} s" if value < 100 else f"{value:.0f} s"


def mib(value: float | None) -> str:
    return "?" if value is None else f"{value / 2**20:.0f} MiB"


def ratio_text(value: float | None, *, at_least: bool = False) -> str:
    if value is None:
        return "n/a"
    return f"{'> ' if at_least else ''}{value:.2f}x"


def time_ratio(candidate: Series, reference: Series) -> float | None:
    """Median seconds of the candidate over the reference's (same rounds)."""
    a, b = candidate.seconds, reference.seconds
    return a / b if a is not None and b else None


def memory_ratio(candidate: Series, reference: Series) -> float | None:
    a, b = candidate.peak_bytes, reference.peak_bytes
    return a / b if a is not None and b else None


def pair_spread(candidate: Series, reference: Series) -> str:
    """The range of the round-by-round time ratios (how much the rounds disagree)."""
    ratios = [a.seconds / b.seconds for a, b in zip(candidate.samples, reference.samples)
              if a.seconds is not None and b.seconds]
    if len(ratios) < 2:
        return ""
    return f" (rounds {min(ratios):.2f}-{max(ratios):.2f})"


def runs_note(*series: Series) -> str:
    counts = sorted({s.runs for s in series})
    return "/".join(str(c) for c in counts)


def rounds_text(count: int) -> str:
    return f"{count} round{'' if count == 1 else 's'}"
