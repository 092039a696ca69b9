"""Small inline SVG plots for the HTML reports: points, horizontal reference lines, bands.

Plain SVG markup with no script and no external reference, so a report stays one printable
file. Every point carries its values in ``data-`` attributes, so that a reader (or a test) can
check a figure against the store without measuring pixels.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from html import escape as _html_escape

#: ``html.escape``, each distinct text escaped once: a report of hundreds of sets escapes
#: tens of thousands of cells and attributes, most of them repeated (statuses, keys, units).
escape = functools.lru_cache(maxsize=4096)(_html_escape)

WIDTH = 560
HEIGHT = 220
MARGIN_LEFT = 72
MARGIN_RIGHT = 16
MARGIN_TOP = 14
MARGIN_BOTTOM = 40
#: Colours, also set by the report's CSS; written on the elements so a copied plot keeps them.
INK = "#333"
POINT = "#1f4e9a"
ALARM = "#b00"
BAND_FILL = "#dfe9df"
#: A white outline under label text keeps it readable where it crosses a point.
HALO = ' paint-order="stroke" stroke="#fff" stroke-width="3"'


@dataclass(frozen=True)
class Point:
    """One plotted point; ``hollow`` draws an open marker, ``attrs`` become data- attributes,
    ``error`` (in y units) draws a bar from y − error to y + error."""

    x: float
    y: float
    hollow: bool = False
    alarm: bool = False
    attrs: Mapping[str, str] = field(default_factory=dict)
    error: float | None = None


@dataclass(frozen=True)
class Line:
    """A horizontal reference line at ``y`` with a label (a mean, a baseline, a limit)."""

    y: float
    label: str
    dashed: bool = False


@dataclass(frozen=True)
class Band:
    """A shaded horizontal band from ``low`` to ``high`` (a tolerance)."""

    low: float
    high: float
    label: str


@dataclass(frozen=True)
class _Scale:
    low: float
    high: float
    start_px: float
    end_px: float

    def __call__(self, value: float) -> float:
        if self.high == self.low:
            return (self.start_px + self.end_px) / 2
        fraction = (value - self.low) / (self.high - self.low)
        return self.start_px + fraction * (self.end_px - self.start_px)


def _limits(values: Sequence[float]) -> tuple[float, float]:
    low, high = min(values), max(values)
    pad = (high - low) * 0.08 or abs(high) * 0.001 or 1.0
    return low - pad, high + pad


def _ticks(low: float, high: float, count: int = 6, min_step: float = 0.0) -> list[float]:
    """Return round tick values (1, 2, 2.5 or 5 times a power of ten apart, and at least
    ``min_step``) within low..high."""
    raw = max((high - low) / (count - 1), min_step)
    magnitude = 10 ** math.floor(math.log10(raw))
    # 2.5 needs one decimal more than its power of ten: not with a stated resolution.
    factors = (1, 2, 2.5, 5, 10) if min_step == 0 else (1, 2, 5, 10)
    step = next(m * magnitude for m in factors if m * magnitude >= raw)
    first = math.ceil(low / step)
    return [
        (first + i) * step
        for i in range(int((high - low) / step) + 2)
        if (first + i) * step <= high
    ]


def _fmt(value: float, decimals: int | None = None) -> str:
    if decimals is None:
        return f"{round(value, 9):g}"
    text = f"{value:+.{decimals}f}"
    return text if float(text) != 0 else f"{0:.{decimals}f}"


def plot(
    points: Sequence[Point],
    *,
    title: str,
    x_label: str,
    y_label: str,
    lines: Sequence[Line] = (),
    bands: Sequence[Band] = (),
    x_ticks: Sequence[tuple[float, str]] = (),
    y_decimals: int | None = None,
    y_min_step: float = 0.0,
) -> str:
    """Return an inline ``<svg>`` element plotting ``points`` with reference lines and bands.

    ``y_decimals``: the y tick labels' decimals (signed), e.g. the instrument's resolution;
    ``y_min_step``: the finest y tick step (no finer than that resolution).
    """
    ys = [p.y for p in points] + [line.y for line in lines]
    ys += [p.y + sign * p.error for p in points if p.error is not None for sign in (-1, 1)]
    ys += [v for band in bands for v in (band.low, band.high)]
    xs = [p.x for p in points] or [0.0]
    y_low, y_high = _limits(ys or [0.0])
    x_low, x_high = min(xs) - 0.5, max(xs) + 0.5
    sx = _Scale(x_low, x_high, MARGIN_LEFT, WIDTH - MARGIN_RIGHT)
    sy = _Scale(y_low, y_high, HEIGHT - MARGIN_BOTTOM, MARGIN_TOP)
    parts = [
        f'<svg xmlns="http://www.w3.org/2000/svg" class="plot" role="img" '
        f'viewBox="0 0 {WIDTH} {HEIGHT}" width="{WIDTH}" height="{HEIGHT}" '
        f'data-title="{escape(title)}">',
        f"<title>{escape(title)}</title>",
    ]
    for band in bands:
        top, bottom = sy(band.high), sy(band.low)
        parts.append(
            f'<rect class="band" fill="{BAND_FILL}" x="{MARGIN_LEFT}" y="{top:.1f}" '
            f'width="{WIDTH - MARGIN_LEFT - MARGIN_RIGHT}" height="{bottom - top:.1f}" '
            f'data-low="{band.low!r}" data-high="{band.high!r}"><title>{escape(band.label)}'
            "</title></rect>"
        )
    parts += _axes(sy, y_low, y_high, x_label, y_label, y_decimals, y_min_step)
    for x, label in x_ticks:
        parts.append(
            f'<text class="tick" x="{sx(x):.1f}" y="{HEIGHT - MARGIN_BOTTOM + 14}" '
            f'text-anchor="middle">{escape(label)}</text>'
        )
    labels = []
    for line in lines:
        y = sy(line.y)
        dash = ' stroke-dasharray="4 3"' if line.dashed else ""
        parts.append(
            f'<line class="ref" stroke="{INK}" x1="{MARGIN_LEFT}" x2="{WIDTH - MARGIN_RIGHT}" '
            f'y1="{y:.1f}" y2="{y:.1f}"{dash} data-y="{line.y!r}"/>'
        )
        if line.label:  # drawn last, over the points, with a halo
            labels.append(
                f'<text class="ref-label" x="{WIDTH - MARGIN_RIGHT - 2}" y="{y - 3:.1f}" '
                f'text-anchor="end"{HALO}>{escape(line.label)}</text>'
            )
    for point in points:
        attrs = "".join(f' data-{k}="{escape(str(v))}"' for k, v in point.attrs.items())
        css = "point" + (" hollow" if point.hollow else "") + (" alarm" if point.alarm else "")
        colour = ALARM if point.alarm else POINT
        fill = "#fff" if point.hollow else colour
        if point.error is not None:
            parts.append(
                f'<line class="error-bar" stroke="{colour}" x1="{sx(point.x):.1f}" '
                f'x2="{sx(point.x):.1f}" y1="{sy(point.y - point.error):.1f}" '
                f'y2="{sy(point.y + point.error):.1f}" data-error="{point.error!r}"/>'
            )
        parts.append(
            f'<circle class="{css}" fill="{fill}" stroke="{colour}" cx="{sx(point.x):.1f}" '
            f'cy="{sy(point.y):.1f}" r="4"{attrs}/>'
        )
    parts += labels
    parts.append("</svg>")
    return "".join(parts)


def _axes(
    sy: _Scale,
    low: float,
    high: float,
    x_label: str,
    y_label: str,
    decimals: int | None,
    min_step: float,
) -> list[str]:
    bottom = HEIGHT - MARGIN_BOTTOM
    parts = [
        f'<line class="axis" stroke="{INK}" x1="{MARGIN_LEFT}" x2="{MARGIN_LEFT}" '
        f'y1="{MARGIN_TOP}" y2="{bottom}"/>',
        f'<line class="axis" stroke="{INK}" x1="{MARGIN_LEFT}" x2="{WIDTH - MARGIN_RIGHT}" '
        f'y1="{bottom}" y2="{bottom}"/>',
        f'<text class="axis-label" x="{(MARGIN_LEFT + WIDTH) / 2:.0f}" y="{HEIGHT - 6}" '
        f'text-anchor="middle">{escape(x_label)}</text>',
        f'<text class="axis-label" x="12" y="{(MARGIN_TOP + bottom) / 2:.0f}" '
        f'text-anchor="middle" transform="rotate(-90 12 {(MARGIN_TOP + bottom) / 2:.0f})">'
        f"{escape(y_label)}</text>",
    ]
    for tick in _ticks(low, high, min_step=min_step):
        y = sy(tick)
        parts.append(
            f'<text class="tick" x="{MARGIN_LEFT - 4}" y="{y + 3:.1f}" text-anchor="end" '
            f'data-value="{tick!r}">{_fmt(tick, decimals)}</text>'
        )
    return parts
