"""The HTML report's charts, written directly as small inline SVG: a roofline and a per-layer
latency and energy chart.

No plotting library: each chart is a few hundred SVG elements built from the
records (text as text, colours as the page's CSS custom properties ``--rg-*``,
so both palettes apply). Output is deterministic, so identical results give
byte-identical reports, and a chart takes milliseconds, not seconds.

Each chart's data elements carry ids (``<chart id>-head-points``, ``-roof``,
``-ridge``, ``-latency-<row>``, ...) and the root ``<svg>`` carries ``data-*``
figures, so tests can count what was drawn. Layers the result names in failing
findings are *flagged*: ringed on the roofline and marked on their bar row
(class ``flagged``, ``data-layer`` = the layer name), in both charts.

The roofline follows Williams, Waterman & Patterson, "Roofline", CACM 2009:
attainable throughput = min(peak FLOP/s, arithmetic intensity x DRAM bytes/s).
The points are what each layer *achieves* (its FLOPs over its modelled latency);
the roof is what the target allows at the run's precision.
"""

from __future__ import annotations

import heapq
import math
from collections.abc import Collection, Mapping, Sequence
from dataclasses import dataclass

from gate import metrics, units
from gate.records import LayerRecord, RunRecord
from gate.report.text import html_escape, shorten

# Most points on a roofline / bars in the layer chart; the rest are counted, not drawn.
MAX_ROOFLINE_POINTS = 300
MAX_BAR_LAYERS = 30
LABELLED_LAYERS = 3  # the slowest layers get a label on the roofline (flagged ones always)

# Energy components in the records (metric, legend label, CSS custom property).
ENERGY_PARTS: tuple[tuple[str, str, str], ...] = (
    ("energy_mac_j", "MACs", "--rg-e-mac"),
    ("energy_buffer_j", "on-chip buffers", "--rg-e-buffer"),
    ("energy_noc_j", "PE-array distribution", "--rg-e-noc"),
    ("energy_dram_param_j", "DRAM parameters", "--rg-e-dram-param"),
    ("energy_dram_act_j", "DRAM activations", "--rg-e-dram-act"),
    ("energy_static_j", "static", "--rg-e-static"),
)

_FONT_PX = 11.0
_CHAR_PX = 6.1  # average advance of the sans-serif at 11 px: for label boxes (estimate)


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
    unknown: int = 0  # modelled, but intensity, FLOP/s or latency unknown: never plotted as 0


# --- what to plot ---------------------------------------------------------------------------

_ROOF_FIGURES = ("arithmetic_intensity", "achieved_flops_per_s", "latency_s")


def roof_points(run: RunRecord, max_points: int = MAX_ROOFLINE_POINTS) -> RoofSelection:
    """The layers of ``run`` placed on its roofline: top ``max_points`` by latency. A layer
    with an unknown figure is counted, never placed as if the figure were 0."""
    plottable, unplottable, unmodelled, unknown = [], 0, 0, 0
    for layer in run.layers:
        figures = [known(layer.metrics, name) for name in _ROOF_FIGURES]
        if not layer.modelled:
            unmodelled += 1
        elif any(value is None for value in figures):
            unknown += 1
        elif _positive(figures[0] or 0.0) and _positive(figures[1] or 0.0):
            plottable.append(layer)
        else:
            unplottable += 1
    top = heapq.nsmallest(max_points, plottable, key=_latency_rank)  # no full sort of 200k
    total_s = known(run.metrics, "latency_s") or sum(_finite(l.metrics, "latency_s")
                                                     for l in plottable) or 1.0
    points = tuple(
        RoofPoint(layer.name, _finite(layer.metrics, "arithmetic_intensity"),
                  _finite(layer.metrics, "achieved_flops_per_s"),
                  _finite(layer.metrics, "latency_s") / total_s)
        for layer in top)
    return RoofSelection(points, len(plottable) - len(top), unplottable, unmodelled, unknown)


def roof_vertices(peak_flops_per_s: float, dram_bytes_per_s: float,
                  lo_flop_per_byte: float, hi_flop_per_byte: float) -> list[tuple[float, float]]:
    """The roof as a polyline: the bandwidth slope up to the ridge, then the compute roof."""
    ridge = peak_flops_per_s / dram_bytes_per_s
    return [(lo_flop_per_byte, lo_flop_per_byte * dram_bytes_per_s),
            (ridge, peak_flops_per_s), (hi_flop_per_byte, peak_flops_per_s)]


@dataclass(frozen=True, slots=True)
class BarSelection:
    """The layers of one run in the bar chart (largest latency first), how many with a known
    latency were left out, and how many have no known latency (never drawn as 0)."""

    layers: tuple[LayerRecord, ...]
    left_out: int
    unknown_latency: int


def bar_layers(run: RunRecord, max_layers: int = MAX_BAR_LAYERS) -> BarSelection:
    """The slowest ``max_layers`` layers of ``run`` with a known latency."""
    timed = [layer for layer in run.layers if known(layer.metrics, "latency_s") is not None]
    top = heapq.nsmallest(max_layers, timed, key=_latency_rank)
    return BarSelection(tuple(top), len(timed) - len(top), len(run.layers) - len(timed))


def unknown_energy(layer: LayerRecord) -> bool:
    """True when any energy component of ``layer`` is unknown (its stack is not drawn)."""
    return any(known(layer.metrics, metric) is None for metric, _l, _c in ENERGY_PARTS)


def _latency_rank(layer: LayerRecord) -> tuple[float, str]:
    return (-_finite(layer.metrics, "latency_s"), layer.name)


def known(values: Mapping[str, object], name: str) -> float | None:
    """A metric as a float, or None when missing, unknown (None) or not finite."""
    value = values.get(name)
    kind = type(value)
    # the common cases first (this runs for every layer); bool is not a figure
    if kind is not float and kind is not int and (
            isinstance(value, bool) or not isinstance(value, (int, float))):
        return None
    return float(value) if math.isfinite(value) else None  # type: ignore[arg-type]


def _finite(values: Mapping[str, object], name: str) -> float:
    """A metric as a float, 0 when missing, unknown or not finite: only for sorting and for
    figures already checked with ``known`` (an unknown is never drawn as 0)."""
    value = known(values, name)
    return 0.0 if value is None else value


def _positive(value: float) -> bool:
    return math.isfinite(value) and value > 0


# --- SVG building blocks ----------------------------------------------------------------------

def _x(text: str) -> str:
    """Text or attribute value safe inside SVG (escaped, one line, no control characters)."""
    return html_escape(text)


def _n(value: float) -> str:
    """A coordinate with two decimals (deterministic, compact)."""
    return f"{value:.2f}"


def _text(x: float, y: float, text: str, *, anchor: str = "start", css: str = "",
          extra: str = "") -> str:
    cls = f' class="{css}"' if css else ""
    return (f'<text x="{_n(x)}" y="{_n(y)}" text-anchor="{anchor}"{cls}{extra}>'
            f"{_x(text)}</text>")


def _svg(chart_id: str, width: int, height: int, label: str, data: Mapping[str, object],
         body: Sequence[str]) -> str:
    attrs = " ".join(f'data-{key}="{_x(_attr(value))}"' for key, value in data.items())
    return (f'<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {width} {height}" '
            f'id="{chart_id}" class="chart" role="img" aria-label="{_x(label)}" {attrs}>'
            f'<style>text{{font:{_FONT_PX:g}px system-ui,sans-serif;fill:var(--rg-ink)}}'
            ".muted{fill:var(--rg-muted)}.axis{font-weight:600}"
            ".flagtext{font-weight:700;fill:var(--rg-fail)}</style>"
            + "".join(body) + "</svg>\n")


def _attr(value: object) -> str:
    return repr(value) if isinstance(value, float) else str(value)


def decade_ticks(lo: float, hi: float) -> list[float]:
    """Powers of ten from ``lo`` to ``hi`` (both powers of ten)."""
    first, last = round(math.log10(lo)), round(math.log10(hi))
    return [10.0 ** k for k in range(first, last + 1)]


def tick_text(value: float, unit: str = "") -> str:
    """Axis tick text: ``100 M``, ``1 G``, ``0.1`` (the units module's prefixes)."""
    if value < 1000:
        return f"{value:g}"
    return units.fmt_count(value, unit).replace(".00 ", " ").replace(".0 ", " ")


def nice_ticks(top: float, count: int = 4) -> list[float]:
    """0 and a few round steps (1, 2 or 5 x 10^k) up to at least ``top``."""
    if top <= 0:
        return [0.0, 1.0]
    raw = top / count
    power = 10.0 ** math.floor(math.log10(raw))
    step = next(m * power for m in (1, 2, 5, 10) if m * power >= raw)
    return [step * k for k in range(math.ceil(top / step - 1e-9) + 1)]


@dataclass(frozen=True)
class _LogAxes:
    """Log-log plot area: data -> SVG coordinates."""

    left: float
    top: float
    width: float
    height: float
    x_lo: float
    x_hi: float
    y_lo: float
    y_hi: float

    def x(self, value: float) -> float:
        span = math.log10(self.x_hi) - math.log10(self.x_lo)
        return self.left + (math.log10(value) - math.log10(self.x_lo)) / span * self.width

    def y(self, value: float) -> float:
        span = math.log10(self.y_hi) - math.log10(self.y_lo)
        return self.top + self.height - (math.log10(value) - math.log10(self.y_lo)) / span \
            * self.height


# --- the roofline -----------------------------------------------------------------------------

def roofline_svg(head: RunRecord, base: RunRecord | None, chart_id: str, *,
                 flagged: Collection[str] = (), max_points: int = MAX_ROOFLINE_POINTS,
                 head_points: RoofSelection | None = None) -> str:
    """Roofline of ``head`` (and ``base`` hollow when given); ``flagged`` layers ringed.
    ``head_points``: ``roof_points(head, max_points)`` when the caller already has it."""
    figures = head.target_figures
    peak = _finite(figures, "peak_flops_per_s")
    bandwidth = _finite(figures, "dram_bytes_per_s")
    has_roof = _positive(peak) and _positive(bandwidth)
    head_sel = head_points if head_points is not None else roof_points(head, max_points)
    base_sel = roof_points(base, max_points) if base is not None else None
    axes = _roof_axes(head_sel, base_sel, peak if has_roof else 0.0,
                      bandwidth if has_roof else 0.0)
    body = _log_grid(axes)
    if has_roof:
        body += _roof(axes, chart_id, peak, bandwidth, head.precision)
    if base_sel is not None:
        body.append(_points(axes, base_sel, f"{chart_id}-base-points", hollow=True))
    body.append(_points(axes, head_sel, f"{chart_id}-head-points", hollow=False))
    body += _flags_and_labels(axes, head_sel, chart_id, flagged)
    if not head_sel.points:
        body.append(_text(axes.left + axes.width / 2, axes.top + axes.height / 2,
                          "no modelled layer to plot", anchor="middle", css="muted"))
    body += _roof_axis_titles(axes, head.precision)
    body.append(_roof_legend(axes, base_sel is not None, bool(flagged)))
    data: dict[str, object] = {
        "chart": "roofline", "model": head.model, "target": head.target,
        "precision": head.precision,
        "head-points": len(head_sel.points), "head-left-out": head_sel.left_out,
        "head-unplottable": head_sel.unplottable, "head-unmodelled": head_sel.unmodelled,
        "head-unknown": head_sel.unknown,
        "peak-flops-per-s": peak, "dram-bytes-per-s": bandwidth,
        "ridge-flop-per-byte": _finite(figures, "ridge_flop_per_byte") if has_roof else 0.0,
        "flagged": len([p for p in head_sel.points if p.name in flagged]),
    }
    if base_sel is not None:
        data.update({"base-points": len(base_sel.points), "base-left-out": base_sel.left_out,
                     "base-unplottable": base_sel.unplottable, "base-unknown": base_sel.unknown})
    label = f"Roofline of {head.model_name} on {head.target} ({head.precision})"
    return _svg(chart_id, 860, 430, label, data, body)


def _roof_axes(head: RoofSelection, base: RoofSelection | None, peak: float,
               bandwidth: float) -> _LogAxes:
    """Whole decades around every plotted point and the ridge point."""
    points = [*head.points, *(base.points if base else ())]
    xs = [p.intensity_flop_per_byte for p in points]
    ys = [p.achieved_flops_per_s for p in points]
    if peak and bandwidth:
        xs.append(peak / bandwidth)
        ys.append(peak)
    x_lo, x_hi = (0.1, 1000.0) if not xs else (
        10.0 ** (math.floor(math.log10(min(xs))) - 1), 10.0 ** (math.ceil(math.log10(max(xs))) + 1))
    top = max([*ys, 1.0])
    y_hi = 10.0 ** math.ceil(math.log10(top) + 0.3)
    y_lo = 10.0 ** math.floor(math.log10(min([*ys, top / 1e4])) - 0.3)
    return _LogAxes(78.0, 18.0, 760.0, 350.0, x_lo, x_hi, y_lo, y_hi)


def _log_grid(axes: _LogAxes) -> list[str]:
    out = ['<g class="grid" stroke="var(--rg-grid)" stroke-width="1">']
    bottom = axes.top + axes.height
    for value in decade_ticks(axes.x_lo, axes.x_hi):
        x = axes.x(value)
        out.append(f'<line x1="{_n(x)}" y1="{_n(axes.top)}" x2="{_n(x)}" y2="{_n(bottom)}"/>')
    for value in decade_ticks(axes.y_lo, axes.y_hi):
        y = axes.y(value)
        out.append(f'<line x1="{_n(axes.left)}" y1="{_n(y)}" x2="{_n(axes.left + axes.width)}" '
                   f'y2="{_n(y)}"/>')
    out.append("</g>")
    out += [_text(axes.x(v), bottom + 15, tick_text(v), anchor="middle", css="muted")
            for v in decade_ticks(axes.x_lo, axes.x_hi)]
    out += [_text(axes.left - 6, axes.y(v) + 4, tick_text(v), anchor="end", css="muted")
            for v in decade_ticks(axes.y_lo, axes.y_hi)]
    return out


def _roof(axes: _LogAxes, chart_id: str, peak: float, bandwidth: float,
          precision: str) -> list[str]:
    vertices = roof_vertices(peak, bandwidth, axes.x_lo, axes.x_hi)
    path = " ".join(f"{'M' if k == 0 else 'L'} {_n(axes.x(x))} {_n(axes.y(y))}"
                    for k, (x, y) in enumerate(vertices))
    ridge_x, ridge_y = axes.x(vertices[1][0]), axes.y(peak)
    ridge = vertices[1][0]
    return [
        (f'<g id="{chart_id}-roof"><path d="{path}" fill="none" stroke="var(--rg-roof)" '
        f'stroke-width="2.4"/></g>'),
        (f'<line x1="{_n(ridge_x)}" y1="{_n(axes.top)}" x2="{_n(ridge_x)}" '
        f'y2="{_n(axes.top + axes.height)}" stroke="var(--rg-ridge)" stroke-dasharray="3 4"/>'),
        (f'<g id="{chart_id}-ridge"><circle cx="{_n(ridge_x)}" cy="{_n(ridge_y)}" r="4.5" '
        f'fill="var(--rg-ridge)"/></g>'),
        _text(ridge_x + 7, ridge_y - 7, f"ridge point {metrics.fmt('ridge_flop_per_byte', ridge)}"
              f" ({precision})", css="muted"),
    ]


def _radius(share: float) -> float:
    """Marker radius: area grows with the layer's share of the model's latency."""
    return 2.5 + 13.0 * math.sqrt(min(max(share, 0.0), 1.0))


def _points(axes: _LogAxes, selection: RoofSelection, group_id: str, *, hollow: bool) -> str:
    colour = "var(--rg-base)" if hollow else "var(--rg-head)"
    paint = (f'fill="none" stroke="{colour}" stroke-width="1.4"' if hollow
             else f'fill="{colour}" fill-opacity="0.7" stroke="{colour}"')
    # largest first, so small markers stay visible on top
    ordered = sorted(selection.points, key=lambda p: -p.latency_share)
    circles = "".join(
        f'<circle cx="{_n(axes.x(p.intensity_flop_per_byte))}" '
        f'cy="{_n(axes.y(p.achieved_flops_per_s))}" r="{_n(_radius(p.latency_share))}" '
        f'data-layer="{_x(p.name)}"><title>{_x(p.name)}</title></circle>' for p in ordered)
    return f'<g id="{group_id}" {paint}>{circles}</g>'


def _flags_and_labels(axes: _LogAxes, selection: RoofSelection, chart_id: str,
                      flagged: Collection[str]) -> list[str]:
    """Rings around flagged layers, then labels (flagged first, then the slowest) placed
    where they overlap neither another label nor the plot edge; a label with no free
    place is left out (the table below names every layer)."""
    marked = [p for p in selection.points if p.name in flagged]
    rings = "".join(
        f'<circle class="flagged" data-layer="{_x(p.name)}" '
        f'cx="{_n(axes.x(p.intensity_flop_per_byte))}" '
        f'cy="{_n(axes.y(p.achieved_flops_per_s))}" r="{_n(_radius(p.latency_share) + 4)}"/>'
        for p in marked)
    out = [(f'<g id="{chart_id}-flagged" fill="none" stroke="var(--rg-fail)" '
           f'stroke-width="2.2">{rings}</g>')]
    wanted = marked + [p for p in selection.points[:LABELLED_LAYERS] if p not in marked]
    boxes: list[tuple[float, float, float, float]] = []
    labels = []
    for point in wanted:
        placed = _place_label(axes, point, boxes)
        if placed is None:
            continue
        x, y, anchor = placed
        css = "flagtext" if point.name in flagged else "muted"
        labels.append(_text(x, y, _label(point.name), anchor=anchor, css=css,
                            extra=f' data-layer="{_x(point.name)}"'))
    out.append(f'<g id="{chart_id}-labels">{"".join(labels)}</g>')
    return out


def _label(name: str) -> str:
    return shorten(name, 30)


def _place_label(axes: _LogAxes, point: RoofPoint,
                 boxes: list[tuple[float, float, float, float]]) -> tuple[float, float, str] | None:
    cx, cy = axes.x(point.intensity_flop_per_byte), axes.y(point.achieved_flops_per_s)
    gap = _radius(point.latency_share) + 3
    width = _CHAR_PX * len(_label(point.name))
    for dx, dy, anchor in ((gap, -gap, "start"), (gap, gap + 9, "start"),
                           (-gap, -gap, "end"), (-gap, gap + 9, "end"),
                           (0.0, -gap - 4, "middle"), (0.0, gap + 13, "middle")):
        x, y = cx + dx, cy + dy
        left = x if anchor == "start" else x - width if anchor == "end" else x - width / 2
        box = (left, y - _FONT_PX, left + width, y + 2)
        inside = (box[0] >= axes.left and box[2] <= axes.left + axes.width
                  and box[1] >= axes.top and box[3] <= axes.top + axes.height)
        if inside and not any(_overlap(box, other) for other in boxes):
            boxes.append(box)
            return x, y, anchor
    return None


def _overlap(a: tuple[float, float, float, float], b: tuple[float, float, float, float]) -> bool:
    return a[0] < b[2] and b[0] < a[2] and a[1] < b[3] and b[1] < a[3]


def _roof_axis_titles(axes: _LogAxes, precision: str) -> list[str]:
    mid_x = axes.left + axes.width / 2
    mid_y = axes.top + axes.height / 2
    return [
        _text(mid_x, axes.top + axes.height + 36, "arithmetic intensity (FLOP per byte of "
              "parameters, inputs and outputs moved)", anchor="middle", css="axis"),
        (f'<text x="16" y="{_n(mid_y)}" text-anchor="middle" class="axis" '
        f'transform="rotate(-90 16 {_n(mid_y)})">{_x("FLOP/s: achieved per layer (points), ")}'
        f'{_x(f"attainable at {precision} (roof)")}</text>'),
    ]


def _roof_legend(axes: _LogAxes, with_base: bool, with_flags: bool) -> str:
    x, y = axes.left + 10, axes.top + 14
    items = [('<circle cx="0" cy="-4" r="5" fill="var(--rg-head)" fill-opacity="0.7"/>',
              "head" if with_base else "layers")]
    if with_base:
        items.append((('<circle cx="0" cy="-4" r="5" fill="none" stroke="var(--rg-base)" '
                      'stroke-width="1.4"/>'), "base"))
    if with_flags:
        items.append((('<circle cx="0" cy="-4" r="6" fill="none" stroke="var(--rg-fail)" '
                      'stroke-width="2.2"/>'), "failing a rule"))
    items.append((('<line x1="-6" y1="-4" x2="6" y2="-4" stroke="var(--rg-roof)" '
                  'stroke-width="2.4"/>'), "roof"))
    parts = []
    for k, (mark, text) in enumerate(items):
        parts.append(f'<g transform="translate({_n(x)} {_n(y + 16 * k)})">{mark}'
                     f'{_text(10, 0, text)}</g>')
    return '<g class="legend">' + "".join(parts) + "</g>"


# --- per-layer latency and energy -------------------------------------------------------------

def layer_bars_svg(head: RunRecord, base_latency_s: Mapping[str, float], chart_id: str, *,
                   flagged: Collection[str] = (), max_layers: int = MAX_BAR_LAYERS,
                   bars: BarSelection | None = None) -> str:
    """Latency (the base's as a tick) and energy by component of the slowest layers.

    ``base_latency_s`` maps a head layer name to its matched base layer's latency;
    rows of ``flagged`` layers are marked.
    """
    selection = bars if bars is not None else bar_layers(head, max_layers)
    layers, left_out = selection.layers, selection.left_out
    row_px, top, label_w = 20.0, 64.0, 230.0
    height = int(top + row_px * max(len(layers), 1) + 46)
    panels = ((label_w, 250.0), (label_w + 290.0, 330.0))
    body = [_flag_rows(layers, flagged, chart_id, top, row_px, 860.0)]
    body += _row_labels(layers, flagged, top, row_px, label_w)
    body += _latency_panel(layers, base_latency_s, chart_id, panels[0], top, row_px)
    body += _energy_panel(layers, chart_id, panels[1], top, row_px)
    data: dict[str, object] = {"chart": "layers", "model": head.model, "target": head.target,
                               "layers-shown": len(layers), "layers-left-out": left_out,
                               "latency-unknown": selection.unknown_latency,
                               "energy-unknown": sum(1 for l in layers if unknown_energy(l)),
                               "flagged": sum(1 for layer in layers if layer.name in flagged)}
    label = f"Latency and energy per layer of {head.model_name} on {head.target}"
    return _svg(chart_id, 860, height, label, data, body)


def _flag_rows(layers: Sequence[LayerRecord], flagged: Collection[str], chart_id: str,
               top: float, row_px: float, width: float) -> str:
    rects = "".join(
        f'<rect class="flagged" data-layer="{_x(layer.name)}" x="0" '
        f'y="{_n(top + row * row_px)}" width="{_n(width)}" height="{_n(row_px)}"/>'
        for row, layer in enumerate(layers) if layer.name in flagged)
    return (f'<g id="{chart_id}-flagged" fill="var(--rg-fail)" fill-opacity="0.12" '
            f'stroke="var(--rg-fail)" stroke-width="1">{rects}</g>')


def _row_labels(layers: Sequence[LayerRecord], flagged: Collection[str], top: float,
                row_px: float, label_w: float) -> list[str]:
    return [_text(label_w - 8, top + row * row_px + row_px * 0.7, shorten(layer.name, 34),
                  anchor="end", css="flagtext" if layer.name in flagged else "")
            for row, layer in enumerate(layers)]


def _linear_axis(x0: float, width: float, top: float, bottom: float, ticks: Sequence[float],
                 scale_max: float, title: str) -> list[str]:
    out = ['<g stroke="var(--rg-grid)" stroke-width="1">']
    for tick in ticks:
        x = x0 + tick / scale_max * width
        out.append(f'<line x1="{_n(x)}" y1="{_n(top)}" x2="{_n(x)}" y2="{_n(bottom)}"/>')
    out.append("</g>")
    out += [_text(x0 + t / scale_max * width, bottom + 14, f"{t:g}", anchor="middle",
                  css="muted") for t in ticks]
    out.append(_text(x0 + width / 2, bottom + 32, title, anchor="middle", css="axis"))
    return out


def _latency_panel(layers: Sequence[LayerRecord], base_latency_s: Mapping[str, float],
                   chart_id: str, panel: tuple[float, float], top: float,
                   row_px: float) -> list[str]:
    x0, width = panel
    values = [_finite(layer.metrics, "latency_s") for layer in layers]
    bases = [base_latency_s.get(layer.name) for layer in layers]
    scale, unit = ladder_unit([*values, *(b for b in bases if b is not None)], units.TIME_UNITS)
    scaled = [v / scale for v in values]
    ticks = nice_ticks(max([*scaled, *(b / scale for b in bases if b is not None), 0.0]))
    bottom = top + row_px * max(len(layers), 1)
    out = _linear_axis(x0, width, top, bottom, ticks, ticks[-1], f"latency ({unit})")
    bars = "".join(
        f'<rect id="{chart_id}-latency-{row}" x="{_n(x0)}" y="{_n(top + row * row_px + 3)}" '
        f'width="{_n(v / ticks[-1] * width)}" height="{_n(row_px - 6)}"/>'
        for row, v in enumerate(scaled))
    out.append(f'<g fill="var(--rg-head)">{bars}</g>')
    marks = "".join(
        f'<line x1="{_n(x0 + b / scale / ticks[-1] * width)}" y1="{_n(top + row * row_px + 1)}" '
        f'x2="{_n(x0 + b / scale / ticks[-1] * width)}" y2="{_n(top + (row + 1) * row_px - 1)}"/>'
        for row, b in enumerate(bases) if b is not None and math.isfinite(b))
    if marks:
        out.append(f'<g id="{chart_id}-base-latency" stroke="var(--rg-base)" '
                   f'stroke-width="3">{marks}</g>')
    out += _bar_legend(x0, top - 44, [("var(--rg-head)", "head latency")]
                       + ([("var(--rg-base)", "base: tick mark")] if marks else []))
    return out


def _energy_panel(layers: Sequence[LayerRecord], chart_id: str, panel: tuple[float, float],
                  top: float, row_px: float) -> list[str]:
    x0, width = panel
    # a row with an unknown component gets no stack (a '?' instead): never a short bar
    unknown_rows = [unknown_energy(layer) for layer in layers]
    totals = [0.0 if unknown else sum(_finite(layer.metrics, m) for m, _l, _c in ENERGY_PARTS)
              for layer, unknown in zip(layers, unknown_rows)]
    scale, unit = ladder_unit(totals, units.ENERGY_UNITS)
    ticks = nice_ticks(max([t / scale for t in totals] + [0.0]))
    bottom = top + row_px * max(len(layers), 1)
    out = _linear_axis(x0, width, top, bottom, ticks, ticks[-1],
                       f"energy per inference ({unit})")
    lefts = [0.0] * len(layers)
    for metric, _label, prop in ENERGY_PARTS:
        rects = []
        for row, layer in enumerate(layers):
            if unknown_rows[row]:
                continue
            w = _finite(layer.metrics, metric) / scale / ticks[-1] * width
            rects.append(f'<rect id="{chart_id}-{metric.replace("_", "-")}-{row}" '
                         f'x="{_n(x0 + lefts[row])}" y="{_n(top + row * row_px + 3)}" '
                         f'width="{_n(w)}" height="{_n(row_px - 6)}"/>')
            lefts[row] += w
        out.append(f'<g fill="var({prop})">{"".join(rects)}</g>')
    out += [_text(x0 + 4, top + row * row_px + row_px * 0.7, "? (energy unknown)", css="muted",
                  extra=f' data-unknown="energy" data-layer="{_x(layer.name)}"')
            for row, layer in enumerate(layers) if unknown_rows[row]]
    out += _bar_legend(x0, top - 44, [(f"var({p})", label) for _m, label, p in ENERGY_PARTS])
    return out


def _bar_legend(x: float, y: float, items: Sequence[tuple[str, str]],
                per_row: int = 2) -> list[str]:
    out = []
    for k, (colour, text) in enumerate(items):
        col, row = k % per_row, k // per_row
        px, py = x + col * 150, y + row * 13
        out.append(f'<rect x="{_n(px)}" y="{_n(py - 8)}" width="9" height="9" fill="{colour}"/>'
                   + _text(px + 13, py, text, css="muted"))
    return out


def ladder_unit(values: Sequence[float], ladder: Sequence[tuple[str, float]]
                ) -> tuple[float, str]:
    """The largest unit of ``ladder`` in which the biggest value is at least 1."""
    biggest = max([v for v in values if math.isfinite(v)], default=0.0)
    for unit, size in ladder:
        if biggest >= size:
            return size, unit
    return ladder[-1][1], ladder[-1][0]
