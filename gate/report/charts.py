"""The HTML report's charts: a roofline and a per-layer latency/energy chart, as inline SVG.

Drawn with matplotlib (the optional ``html`` extra), imported lazily so the
rest of roofgate never needs it. Output is deterministic (fixed hash salt, no
date, text kept as text) so identical results give byte-identical reports.

Colours are not baked in: every artist is drawn in a sentinel colour that is
then swapped for a CSS custom property (``var(--rg-ink)``, ...), so the page's
light and dark palettes both apply to the charts. Each chart's data artists
carry ids (``<chart id>-head-points``, ``-roof``, ``-ridge``, ...) and the root
``<svg>`` carries ``data-*`` figures, so tests can count what was plotted.

The roofline follows Williams, Waterman & Patterson, "Roofline", CACM 2009:
attainable throughput = min(peak FLOP/s, arithmetic intensity x DRAM bytes/s).
"""

from __future__ import annotations

import io
import math
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from gate import units
from gate.errors import InputError
from gate.records import LayerRecord, RunRecord
from gate.report.text import shorten, term_safe

INSTALL_HINT = "the HTML report needs matplotlib: pip install 'roofgate[html]'"

# Most points on a roofline / bars in the layer chart; the rest are counted, not drawn.
MAX_ROOFLINE_POINTS = 300
MAX_BAR_LAYERS = 30
ANNOTATED_LAYERS = 3

# Sentinel colour -> CSS custom property (the page defines both palettes).
_SENTINELS = {
    "#0a0b01": "--rg-ink", "#0a0b02": "--rg-muted", "#0a0b03": "--rg-grid",
    "#0a0b04": "--rg-head", "#0a0b05": "--rg-base", "#0a0b06": "--rg-roof",
    "#0a0b07": "--rg-ridge", "#0a0b08": "--rg-paper",
    "#0a0b10": "--rg-e-mac", "#0a0b11": "--rg-e-buffer", "#0a0b12": "--rg-e-noc",
    "#0a0b13": "--rg-e-dram-param", "#0a0b14": "--rg-e-dram-act", "#0a0b15": "--rg-e-static",
}
INK, MUTED, GRID, HEAD, BASE, ROOF, RIDGE, PAPER = (
    "#0a0b01", "#0a0b02", "#0a0b03", "#0a0b04", "#0a0b05", "#0a0b06", "#0a0b07", "#0a0b08")

# Energy components in the records (metric, legend label, sentinel colour).
ENERGY_PARTS: tuple[tuple[str, str, str], ...] = (
    ("energy_mac_j", "MACs", "#0a0b10"),
    ("energy_buffer_j", "on-chip buffers", "#0a0b11"),
    ("energy_noc_j", "PE-array distribution", "#0a0b12"),
    ("energy_dram_param_j", "DRAM parameters", "#0a0b13"),
    ("energy_dram_act_j", "DRAM activations", "#0a0b14"),
    ("energy_static_j", "static", "#0a0b15"),
)

_RC = {
    "svg.fonttype": "none", "font.family": "sans-serif", "font.sans-serif": ["DejaVu Sans"],
    "font.size": 9, "text.color": INK, "axes.labelcolor": INK, "axes.edgecolor": MUTED,
    "xtick.color": MUTED, "ytick.color": MUTED, "xtick.labelcolor": INK,
    "ytick.labelcolor": INK, "axes.facecolor": "none", "figure.facecolor": "none",
    "savefig.facecolor": "none", "legend.facecolor": PAPER, "legend.edgecolor": GRID,
    "legend.framealpha": 0.9, "path.simplify": False,
}


@dataclass(frozen=True, slots=True)
class RoofPoint:
    """One layer as plotted on the roofline."""

    name: str
    intensity_flop_per_byte: float
    achieved_flops_per_s: float
    latency_share: float  # of the model's latency: sets the marker area


@dataclass(frozen=True, slots=True)
class RoofSelection:
    """The layers of one run that go on its roofline, and what was left out and why."""

    points: tuple[RoofPoint, ...]
    left_out: int  # plottable but beyond MAX_ROOFLINE_POINTS (smallest latency first)
    unplottable: int  # modelled, but no FLOPs, traffic or latency: no place on log-log axes
    unmodelled: int = 0  # not modelled at all (no cost counted): never plotted


def require_matplotlib() -> Any:
    """Import matplotlib (Agg backend), or fail with how to install it."""
    try:
        import matplotlib
    except ImportError:
        raise InputError(INSTALL_HINT) from None
    matplotlib.use("Agg", force=False)
    return matplotlib


# --- what to plot (pure, no matplotlib) ---------------------------------------

def roof_points(run: RunRecord, max_points: int = MAX_ROOFLINE_POINTS) -> RoofSelection:
    """The layers of ``run`` placed on its roofline: top ``max_points`` by latency."""
    total_s = _finite(run.metrics, "latency_s") or 1.0
    plottable, unplottable, unmodelled = [], 0, 0
    for layer in run.layers:
        ai = _finite(layer.metrics, "arithmetic_intensity")
        achieved = _finite(layer.metrics, "achieved_flops_per_s")
        if not layer.modelled:
            unmodelled += 1
        elif _positive(ai) and _positive(achieved):
            plottable.append(layer)
        else:
            unplottable += 1
    ranked = sorted(plottable, key=_latency_rank)
    points = tuple(
        RoofPoint(layer.name, _finite(layer.metrics, "arithmetic_intensity"),
                  _finite(layer.metrics, "achieved_flops_per_s"),
                  _finite(layer.metrics, "latency_s") / total_s)
        for layer in ranked[:max_points]
    )
    return RoofSelection(points, max(len(ranked) - max_points, 0), unplottable, unmodelled)


def roof_vertices(peak_flops_per_s: float, dram_bytes_per_s: float,
                  lo_flop_per_byte: float, hi_flop_per_byte: float) -> list[tuple[float, float]]:
    """The roof as a polyline: the bandwidth slope up to the ridge, then the compute roof."""
    ridge = peak_flops_per_s / dram_bytes_per_s
    return [(lo_flop_per_byte, lo_flop_per_byte * dram_bytes_per_s),
            (ridge, peak_flops_per_s), (hi_flop_per_byte, peak_flops_per_s)]


def bar_layers(run: RunRecord, max_layers: int = MAX_BAR_LAYERS) -> tuple[list[LayerRecord], int]:
    """The layers shown in the bar chart (largest latency first) and how many were left out."""
    ranked = sorted(run.layers, key=_latency_rank)
    return ranked[:max_layers], max(len(ranked) - max_layers, 0)


def chart_label(name: str, max_chars: int = 34) -> str:
    """A model-supplied name made safe as matplotlib text: one line, no mathtext, short."""
    return shorten(term_safe(name), max_chars).replace("$", r"\$")


def _latency_rank(layer: LayerRecord) -> tuple[float, str]:
    return (-_finite(layer.metrics, "latency_s"), layer.name)


def _finite(metrics: Mapping[str, float | None], name: str) -> float:
    """A metric as a float, 0 when missing, unknown or not finite (a chart cannot plot
    inf, NaN or '?'; the tables beside it print unknown figures as '?')."""
    value = float(metrics.get(name) or 0.0)
    return value if math.isfinite(value) else 0.0


def _positive(value: float) -> bool:
    return math.isfinite(value) and value > 0


# --- SVG output ---------------------------------------------------------------

def figure_to_svg(fig: Any, chart_id: str, data: Mapping[str, object], label: str) -> str:
    """Render ``fig`` as an inline ``<svg>`` element with themeable colours and data attributes."""
    matplotlib = require_matplotlib()
    buf = io.StringIO()
    with matplotlib.rc_context({**_RC, "svg.hashsalt": chart_id}):
        fig.savefig(buf, format="svg", metadata={"Date": None, "Creator": None,
                                                  "Format": None, "Type": None})
    svg = buf.getvalue()
    svg = svg[svg.index("<svg"):]  # drop the XML declaration and DOCTYPE (external DTD)
    svg = re.sub(r"<!--.*?-->", "", svg, flags=re.DOTALL)
    # matplotlib numbers its unnamed groups per figure (axes_1, text_3): make them page-unique.
    svg = re.sub(r'id="([A-Za-z][A-Za-z0-9.]*_\d+)"', rf'id="{chart_id}-\1"', svg)
    for sentinel, prop in _SENTINELS.items():
        svg = svg.replace(sentinel, f"var({prop})")
    attrs = " ".join(f'data-{key}="{_attr(value)}"' for key, value in data.items())
    root = re.match(r"<svg\b[^>]*>", svg)
    assert root is not None
    viewbox = re.search(r'viewBox="[^"]*"', root.group())
    new_root = (f'<svg xmlns="http://www.w3.org/2000/svg" '
                f'xmlns:xlink="http://www.w3.org/1999/xlink" {viewbox.group() if viewbox else ""} '
                f'id="{chart_id}" class="chart" role="img" aria-label="{_attr(label)}" {attrs}>')
    return new_root + svg[root.end():].rstrip() + "\n"


def _attr(value: object) -> str:
    text = repr(value) if isinstance(value, float) else str(value)
    return (term_safe(text).replace("&", "&amp;").replace('"', "&quot;")
            .replace("<", "&lt;").replace(">", "&gt;"))


def si_tick(value: float, _pos: object = None) -> str:
    """Axis tick text for log axes: ``100 M``, ``1 G``, ``0.1`` (no mathtext)."""
    if value <= 0:
        return ""
    if value < 1000:
        return f"{value:g}"
    return units.fmt_count(value).replace(".00 ", " ").replace(".0 ", " ")


def new_figure(width_in: float, height_in: float, *, left_in: float, right_in: float,
               bottom_in: float, top_in: float, wspace: float = 0.0) -> Any:
    """A pyplot-free figure with the report's styling and fixed margins in inches.

    Fixed margins instead of an automatic layout engine: the layout engine measured
    every tick label and was half the drawing time, and our labels have known sizes.
    """
    matplotlib = require_matplotlib()
    from matplotlib.figure import Figure

    with matplotlib.rc_context(_RC):
        fig = Figure(figsize=(width_in, height_in))
    fig.subplots_adjust(left=left_in / width_in, right=1 - right_in / width_in,
                        bottom=bottom_in / height_in, top=1 - top_in / height_in, wspace=wspace)
    return fig


def rc_context() -> Any:
    """The report's matplotlib style, for drawing into a figure made by ``new_figure``."""
    return require_matplotlib().rc_context(_RC)


def legend_patches(parts: Sequence[tuple[str, str, str]]) -> list[Any]:
    """Legend handles for the energy components."""
    from matplotlib.patches import Patch

    return [Patch(facecolor=colour, edgecolor="none", label=label) for _m, label, colour in parts]


# --- the roofline -------------------------------------------------------------

def roofline_figure(head: RunRecord, base: RunRecord | None, chart_id: str,
                    max_points: int = MAX_ROOFLINE_POINTS) -> tuple[Any, dict[str, object]]:
    """Roofline of ``head`` (and ``base`` when given): the figure and its data attributes."""
    figures = head.target_figures
    peak = _finite(figures, "peak_flops_per_s")
    bandwidth = _finite(figures, "dram_bytes_per_s")
    head_sel = roof_points(head, max_points)
    base_sel = roof_points(base, max_points) if base is not None else None
    with rc_context():
        fig = new_figure(9.0, 4.6, left_in=0.85, right_in=0.15, bottom_in=0.55, top_in=0.1)
        ax = fig.add_subplot()
        ax.set_xscale("log")
        ax.set_yscale("log")
        lo, hi = _intensity_range(head_sel, base_sel, peak, bandwidth)
        has_roof = _positive(peak) and _positive(bandwidth)
        if has_roof:
            _draw_roof(ax, chart_id, peak, bandwidth, lo, hi)
        if base_sel is not None:
            _draw_points(ax, base_sel, f"{chart_id}-base-points", "base", filled=False)
        _draw_points(ax, head_sel, f"{chart_id}-head-points",
                     "head" if base_sel is not None else "layers", filled=True)
        _annotate(ax, head_sel.points[:ANNOTATED_LAYERS])
        if not head_sel.points:
            ax.text(0.5, 0.5, "no modelled layer to plot", transform=ax.transAxes,
                    ha="center", va="center", color=MUTED, fontsize=10)
        _finish_roofline_axes(ax, lo, hi, head_sel, base_sel, peak if has_roof else 0.0)
    data: dict[str, object] = {
        "chart": "roofline", "model": head.model, "target": head.target,
        "head-points": len(head_sel.points), "head-left-out": head_sel.left_out,
        "head-unplottable": head_sel.unplottable, "head-unmodelled": head_sel.unmodelled,
        "peak-flops-per-s": peak, "dram-bytes-per-s": bandwidth,
        "ridge-flop-per-byte": peak / bandwidth if has_roof else 0.0,
    }
    if base_sel is not None:
        data.update({"base-points": len(base_sel.points), "base-left-out": base_sel.left_out,
                     "base-unplottable": base_sel.unplottable})
    return fig, data


def roofline_svg(head: RunRecord, base: RunRecord | None, chart_id: str,
                 max_points: int = MAX_ROOFLINE_POINTS) -> str:
    """The roofline chart as an inline ``<svg>``."""
    fig, data = roofline_figure(head, base, chart_id, max_points)
    label = f"Roofline of {head.model_name} on {head.target}"
    return figure_to_svg(fig, chart_id, data, label)


def _intensity_range(head: RoofSelection, base: RoofSelection | None, peak: float,
                     bandwidth: float) -> tuple[float, float]:
    """Whole decades around every plotted intensity and the ridge point."""
    values = [p.intensity_flop_per_byte for p in head.points]
    values += [p.intensity_flop_per_byte for p in base.points] if base else []
    if _positive(peak) and _positive(bandwidth):
        values.append(peak / bandwidth)
    if not values:
        return 0.1, 1000.0
    lo = 10.0 ** (math.floor(math.log10(min(values))) - 1)
    hi = 10.0 ** (math.ceil(math.log10(max(values))) + 1)
    return lo, hi


def _draw_roof(ax: Any, chart_id: str, peak: float, bandwidth: float,
               lo: float, hi: float) -> None:
    xs, ys = zip(*roof_vertices(peak, bandwidth, lo, hi))
    ax.plot(xs, ys, color=ROOF, linewidth=2.2, gid=f"{chart_id}-roof",
            label=f"roof: {si_tick(peak)}FLOP/s, {units.fmt_count(bandwidth)}B/s DRAM")
    ridge = peak / bandwidth
    ax.axvline(ridge, color=RIDGE, linewidth=1.0, linestyle=(0, (2, 3)), zorder=1)
    ax.plot([ridge], [peak], marker="D", markersize=7, color=RIDGE, linestyle="none",
            gid=f"{chart_id}-ridge", label=f"ridge point: {ridge:.3g} FLOP/byte", zorder=4)


def _draw_points(ax: Any, selection: RoofSelection, gid: str, label: str, *,
                 filled: bool) -> None:
    if not selection.points:
        return
    xs = [p.intensity_flop_per_byte for p in selection.points]
    ys = [p.achieved_flops_per_s for p in selection.points]
    sizes = [14.0 + 520.0 * min(max(p.latency_share, 0.0), 1.0) for p in selection.points]
    colour = HEAD if filled else BASE
    ax.scatter(xs, ys, s=sizes, gid=gid, label=label, zorder=3 if filled else 2,
               facecolors=colour if filled else "none", edgecolors=colour,
               alpha=0.72 if filled else 0.95, linewidths=1.0 if filled else 1.3)


# Label offsets (points) for the annotated layers, alternating so neighbours do not overlap.
_LABEL_OFFSETS = ((8, 6, "left"), (8, -12, "left"), (-8, 6, "right"))


def _annotate(ax: Any, points: Sequence[RoofPoint]) -> None:
    for point, (dx, dy, align) in zip(points, _LABEL_OFFSETS):
        ax.annotate(chart_label(point.name, 28),
                    (point.intensity_flop_per_byte, point.achieved_flops_per_s),
                    xytext=(dx, dy), textcoords="offset points", fontsize=7.5, color=MUTED,
                    ha=align)


def _finish_roofline_axes(ax: Any, lo: float, hi: float, head: RoofSelection,
                          base: RoofSelection | None, peak: float) -> None:
    from matplotlib.ticker import FuncFormatter

    achieved = [p.achieved_flops_per_s for p in head.points]
    achieved += [p.achieved_flops_per_s for p in base.points] if base else []
    top = max([peak, *achieved, 1.0])
    bottom = min([*achieved, top / 1e4])
    ax.set_xlim(lo, hi)
    ax.set_ylim(10.0 ** math.floor(math.log10(bottom) - 0.3), top * 4)
    ax.xaxis.set_major_formatter(FuncFormatter(si_tick))
    ax.yaxis.set_major_formatter(FuncFormatter(si_tick))
    ax.set_xlabel("arithmetic intensity (FLOP per byte of parameters + activations moved)")
    ax.set_ylabel("attainable throughput (FLOP/s)")
    ax.grid(True, which="major", color=GRID, linewidth=0.7)
    ax.set_axisbelow(True)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    if ax.get_legend_handles_labels()[0]:
        ax.legend(loc="lower right", fontsize=7.5, markerscale=0.6)


# --- per-layer latency and energy -----------------------------------------------

def layer_bars_figure(head: RunRecord, base_latency_s: Mapping[str, float], chart_id: str,
                      max_layers: int = MAX_BAR_LAYERS) -> tuple[Any, dict[str, object]]:
    """Latency (with the base's as a tick) and energy by component of the slowest layers.

    ``base_latency_s`` maps a head layer name to its matched base layer's latency.
    """
    layers, left_out = bar_layers(head, max_layers)
    rows = list(range(len(layers)))
    with rc_context():
        fig = new_figure(10.5, 1.3 + 0.24 * max(len(layers), 3), left_in=2.25, right_in=0.15,
                         bottom_in=0.5, top_in=0.55, wspace=0.06)
        left, right = fig.subplots(1, 2, sharey=True, width_ratios=(1, 1.35))
        time_scale, time_unit = _scale([_finite(l.metrics, "latency_s") for l in layers],
                                       units.TIME_UNITS)
        bars = left.barh(rows, [_finite(l.metrics, "latency_s") / time_scale
                                for l in layers], color=HEAD, height=0.68)
        _number_bars(bars, f"{chart_id}-latency")
        _draw_base_ticks(left, layers, base_latency_s, time_scale, chart_id)
        left.set_xlabel(f"latency ({time_unit})")
        _draw_energy(right, layers, chart_id)
        _finish_bar_axes(left, right, layers)
    data: dict[str, object] = {"chart": "layers", "model": head.model, "target": head.target,
                               "layers-shown": len(layers), "layers-left-out": left_out}
    return fig, data


def layer_bars_svg(head: RunRecord, base_latency_s: Mapping[str, float], chart_id: str,
                   max_layers: int = MAX_BAR_LAYERS) -> str:
    """The per-layer chart as an inline ``<svg>``."""
    fig, data = layer_bars_figure(head, base_latency_s, chart_id, max_layers)
    label = f"Latency and energy per layer of {head.model_name} on {head.target}"
    return figure_to_svg(fig, chart_id, data, label)


def _draw_base_ticks(ax: Any, layers: Sequence[LayerRecord], base_latency_s: Mapping[str, float],
                     scale: float, chart_id: str) -> None:
    marks = [(row, base_latency_s[l.name] / scale) for row, l in enumerate(layers)
             if math.isfinite(base_latency_s.get(l.name, math.nan))]
    if marks:
        rows, values = zip(*marks)
        ax.plot(values, rows, marker="|", markersize=13, markeredgewidth=2.2, color=BASE,
                linestyle="none", gid=f"{chart_id}-base-latency", label="base")
        ax.legend(loc="lower left", bbox_to_anchor=(0, 1.01), fontsize=7.5, frameon=False)


def _draw_energy(ax: Any, layers: Sequence[LayerRecord], chart_id: str) -> None:
    totals = [sum(_finite(l.metrics, m) for m, _n, _c in ENERGY_PARTS) for l in layers]
    scale, unit = _scale(totals, units.ENERGY_UNITS)
    lefts = [0.0] * len(layers)
    for metric, label, colour in ENERGY_PARTS:
        widths = [_finite(l.metrics, metric) / scale for l in layers]
        bars = ax.barh(range(len(layers)), widths, left=lefts, color=colour, height=0.68,
                       label=label)
        _number_bars(bars, f"{chart_id}-{metric.replace('_', '-')}")
        lefts = [a + b for a, b in zip(lefts, widths)]
    ax.set_xlabel(f"energy per inference ({unit})")
    ax.legend(handles=legend_patches(ENERGY_PARTS), loc="lower left", bbox_to_anchor=(0, 1.01),
              fontsize=7.5, ncols=3, frameon=False)


def _number_bars(bars: Any, prefix: str) -> None:
    """Give each bar its own id (``<prefix>-<row>``) so the SVG can be checked bar by bar."""
    for row, patch in enumerate(bars.patches):
        patch.set_gid(f"{prefix}-{row}")


def _finish_bar_axes(left: Any, right: Any, layers: Sequence[LayerRecord]) -> None:
    left.set_yticks(range(len(layers)), [chart_label(l.name) for l in layers], fontsize=7.5)
    left.set_ylim(len(layers) - 0.5 if layers else 0.5, -0.5)
    for ax in (left, right):
        ax.grid(True, axis="x", color=GRID, linewidth=0.7)
        ax.set_axisbelow(True)
        for side in ("top", "right"):
            ax.spines[side].set_visible(False)


def _scale(values: Sequence[float], units: Sequence[tuple[str, float]]) -> tuple[float, str]:
    """The largest unit in which the biggest value is at least 1 (seconds, joules)."""
    biggest = max([v for v in values if math.isfinite(v)], default=0.0)
    for unit, scale in units:
        if biggest >= scale:
            return scale, unit
    return units[-1][1], units[-1][0]
