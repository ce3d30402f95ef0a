"""A policy rule for people: a plain sentence and the geometry of a small step chart.

Pure functions, no I/O. The chart is drawn by the console's template as SVG with class
attributes only (the console's Content-Security-Policy allows no inline style).
"""

from __future__ import annotations

from dataclasses import dataclass

from service.policy.document import Rule

WIDTH = 360.0
HEIGHT = 170.0
LEFT = 40.0
RIGHT = 12.0
TOP = 12.0
BOTTOM = 34.0


def _num(value: float) -> str:
    return f"{value:g}"


def _chance(p: float) -> str:
    if p == 1.0:
        return "always get the action"
    if p == 0.0:
        return "never get the action"
    return f"get the action with probability {_num(p)}"


def describe_rule(rule: Rule) -> str:
    """The rule in one sentence: "Cases with a score below 0.2 never get the action; from
    0.2 up to (not including) 0.4 they get it with probability 0.5; at or above 0.4 they
    always get it."."""
    steps = rule.steps
    parts = [f"Cases with a score below {_num(steps[0].start)} never get the action"]
    for i, step in enumerate(steps):
        chance = _chance(step.probability).replace("get the action", "get it")
        if i + 1 < len(steps):
            upper = steps[i + 1].start
            parts.append(
                f"from {_num(step.start)} up to (not including) {_num(upper)} they {chance}"
            )
        else:
            parts.append(f"at or above {_num(step.start)} they {chance}")
    return "; ".join(parts) + "."


@dataclass(frozen=True, slots=True)
class Tick:
    position: float  # pixels along the axis
    label: str


@dataclass(frozen=True, slots=True)
class Band:
    """A randomized range (0 < probability < 1), as a rectangle in pixels."""

    x: float
    y: float
    width: float
    height: float
    label: str


@dataclass(frozen=True, slots=True)
class RuleChart:
    width: float
    height: float
    points: str  # the step line, as an SVG polyline's points
    bands: list[Band]
    x_ticks: list[Tick]
    y_ticks: list[Tick]
    axis_left: float
    axis_right: float
    axis_top: float
    axis_bottom: float
    title: str


def rule_chart(rule: Rule, score_range: tuple[float, float]) -> RuleChart:
    """The step function P(action | score) over ``score_range``, in pixel coordinates."""
    low, high = score_range
    span = high - low
    plot_w = WIDTH - LEFT - RIGHT
    plot_h = HEIGHT - TOP - BOTTOM

    def x(score: float) -> float:
        clamped = min(max(score, low), high)
        return round(LEFT + (clamped - low) / span * plot_w, 2)

    def y(p: float) -> float:
        return round(TOP + (1.0 - p) * plot_h, 2)

    coords: list[tuple[float, float]] = [(x(low), y(0.0))]
    level = 0.0
    for step in rule.steps:
        coords.append((x(step.start), y(level)))
        level = step.probability
        coords.append((x(step.start), y(level)))
    coords.append((x(high), y(level)))
    bands: list[Band] = []
    for i, step in enumerate(rule.steps):
        if 0.0 < step.probability < 1.0:
            upper = rule.steps[i + 1].start if i + 1 < len(rule.steps) else high
            left, right = x(step.start), x(upper)
            bands.append(
                Band(
                    left,
                    y(step.probability),
                    round(right - left, 2),
                    round(y(0.0) - y(step.probability), 2),
                    f"probability {_num(step.probability)}",
                )
            )
    edges = sorted({low, high, *(s.start for s in rule.steps if low <= s.start <= high)})
    return RuleChart(
        width=WIDTH,
        height=HEIGHT,
        points=" ".join(f"{a:g},{b:g}" for a, b in coords),
        bands=bands,
        x_ticks=[Tick(x(e), _num(e)) for e in edges],
        y_ticks=[Tick(y(p), _num(p)) for p in (0.0, 0.5, 1.0)],
        axis_left=LEFT,
        axis_right=WIDTH - RIGHT,
        axis_top=TOP,
        axis_bottom=HEIGHT - BOTTOM,
        title=describe_rule(rule),
    )


@dataclass(frozen=True, slots=True)
class CompareChart:
    """Two versions' rules for one group on one chart: the earlier as a solid line, the later
    dashed (told apart by the line's pattern and the legend, not by colour alone)."""

    width: float
    height: float
    before: RuleChart | None
    after: RuleChart | None
    x_ticks: list[Tick]
    y_ticks: list[Tick]
    axis_left: float
    axis_right: float
    axis_top: float
    axis_bottom: float
    title: str


def compare_chart(
    before: Rule | None,
    after: Rule | None,
    score_range: tuple[float, float],
    labels: tuple[str, str] = ("before", "after"),
) -> CompareChart:
    """``before`` and ``after`` (either may be missing) drawn over the same ``score_range``."""
    charts = [None if r is None else rule_chart(r, score_range) for r in (before, after)]
    drawn = [c for c in charts if c is not None]
    if not drawn:
        raise ValueError("compare_chart needs at least one rule")
    ticks = {t.position: t for c in drawn for t in c.x_ticks}
    words = [
        f"{label}: {'no rule' if c is None else c.title}"
        for label, c in zip(labels, charts, strict=True)
    ]
    first = drawn[0]
    return CompareChart(
        width=WIDTH,
        height=HEIGHT,
        before=charts[0],
        after=charts[1],
        x_ticks=[ticks[p] for p in sorted(ticks)],
        y_ticks=first.y_ticks,
        axis_left=first.axis_left,
        axis_right=first.axis_right,
        axis_top=first.axis_top,
        axis_bottom=first.axis_bottom,
        title=" ".join(words),
    )
