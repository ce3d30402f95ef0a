"""The geometry of a small chart of estimates with their intervals (pure, no I/O).

Categories (groups, or months) along the horizontal axis, the value on the vertical axis:
each estimate a point with a whisker from its interval's low to its high end. The console's
templates draw it as inline SVG with class attributes only (the console's
Content-Security-Policy allows no inline style); every coordinate is computed here.

The value axis runs between two "nice" tick values (multiples of 0.05, 0.1, 0.2, 0.25, 0.5,
1, 2 or 5) that hold every interval, so each tick's label is its exact value and a drawn
position can be read back from the ticks.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

WIDTH = 360.0  # at least; wider when many categories need room (MIN_SLOT each)
HEIGHT = 210.0
LEFT = 48.0
RIGHT = 12.0
TOP = 14.0
BOTTOM = 40.0
_STEPS = (0.05, 0.1, 0.2, 0.25, 0.5, 1.0, 2.0, 5.0)
MAX_TICK_INTERVALS = 5
MAX_LABELS = 12
MIN_SLOT = 64.0


def _px(value: float) -> float:
    return round(value, 2)


def _label(value: float) -> str:
    return f"{round(value, 10):g}"


@dataclass(frozen=True, slots=True)
class Tick:
    position: float  # pixels along the axis
    label: str
    row: int = 0  # category labels alternate between two rows so long names do not collide


@dataclass(frozen=True, slots=True)
class Point:
    key: str  # the category: a group or a month
    x: float
    y: float
    y_low: float  # the interval's low end (a larger pixel y: lower on the chart)
    y_high: float
    title: str
    signal: bool = False


@dataclass(frozen=True, slots=True)
class Note:
    """A category without a figure: why, written where its point would be."""

    x: float
    y: float
    text: str


@dataclass(frozen=True, slots=True)
class IntervalChart:
    title: str  # the chart's accessible name
    width: float
    height: float
    left: float
    right: float
    top: float
    bottom: float
    y_ticks: list[Tick]
    x_labels: list[Tick]
    points: list[Point]
    notes: list[Note]
    line: str  # an SVG polyline's points joining the points in order ("" for none)
    reference: Tick | None  # a horizontal reference line (its y and what it is)


@dataclass(frozen=True, slots=True)
class Figure:
    """One category's estimate and interval (None when withheld, with ``note`` saying why)."""

    key: str
    value: float | None
    low: float | None
    high: float | None
    title: str
    note: str = ""
    signal: bool = False


def value_range(lows: Sequence[float], highs: Sequence[float]) -> tuple[float, float, float]:
    """(first tick, last tick, step): the fewest nice ticks holding every value."""
    lo, hi = min(lows), max(highs)
    if hi - lo <= 0:
        hi = lo + 1.0
    for step in _STEPS:
        first = math.floor(lo / step + 1e-9) * step
        last = math.ceil(hi / step - 1e-9) * step
        if (last - first) / step <= MAX_TICK_INTERVALS + 1e-9:
            return round(first, 10), round(last, 10), step
    step = 10.0 ** math.ceil(math.log10((hi - lo) / MAX_TICK_INTERVALS))
    return math.floor(lo / step) * step, math.ceil(hi / step) * step, step


def interval_chart(
    title: str,
    figures: Sequence[Figure],
    floor: float,
    ceiling: float,
    join: bool = False,
    reference: tuple[float, str] | None = None,
) -> IntervalChart:
    """The chart of ``figures`` in order; the value axis holds [floor, ceiling], every
    interval and the reference value."""
    lows = [floor] + [f.low for f in figures if f.low is not None]
    highs = [ceiling] + [f.high for f in figures if f.high is not None]
    if reference is not None:
        lows.append(reference[0])
        highs.append(reference[0])
    first, last, step = value_range(lows, highs)
    width = max(WIDTH, LEFT + RIGHT + MIN_SLOT * min(len(figures), MAX_LABELS))
    top, bottom = TOP, HEIGHT - BOTTOM
    left, right = LEFT, width - RIGHT

    def y_of(value: float) -> float:
        clamped = min(max(value, first), last)
        return _px(bottom - (clamped - first) / (last - first) * (bottom - top))

    count = round((last - first) / step)
    y_ticks = [Tick(y_of(first + i * step), _label(first + i * step)) for i in range(count + 1)]
    slot = (right - left) / max(len(figures), 1)
    every = max(1, math.ceil(len(figures) / MAX_LABELS))  # labels that fit side by side
    x_labels: list[Tick] = []
    points: list[Point] = []
    notes: list[Note] = []
    for i, f in enumerate(figures):
        x = _px(left + (i + 0.5) * slot)
        if i % every == 0:
            x_labels.append(Tick(x, f.key, len(x_labels) % 2))
        if f.value is None or f.low is None or f.high is None:
            notes.append(Note(x, _px((top + bottom) / 2), f.note))
            continue
        points.append(Point(f.key, x, y_of(f.value), y_of(f.low), y_of(f.high), f.title, f.signal))
    line = " ".join(f"{p.x},{p.y}" for p in points) if join and len(points) > 1 else ""
    return IntervalChart(
        title=title,
        width=width,
        height=HEIGHT,
        left=left,
        right=right,
        top=top,
        bottom=bottom,
        y_ticks=y_ticks,
        x_labels=x_labels,
        points=points,
        notes=notes,
        line=line,
        reference=None if reference is None else Tick(y_of(reference[0]), reference[1]),
    )
