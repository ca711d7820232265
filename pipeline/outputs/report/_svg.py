"""Inline SVG figures of the study report: patient flow, incidence curves, combination bars.

The report must open offline and print cleanly, so every figure is plain SVG text built here:
no scripts, no external fonts or images, colours from the report's CSS custom properties.
Numbers arrive already formatted (and suppressed) by the caller; this module only draws, and
escapes every string it is given because step descriptions and titles come from user files.

Flow-diagram numbers carry ``data-step`` and ``data-field`` attributes so tests (and readers
with a DOM inspector) can check them against the attrition log without parsing geometry.
"""

from __future__ import annotations

import math
import textwrap
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from html import escape

import numpy as np
from numpy.typing import NDArray

__all__ = [
    "DEFINING_STEPS",
    "Bar",
    "Curve",
    "FlowStep",
    "flow_side",
    "flow_title",
    "render_bars",
    "render_curves",
    "render_flow",
]

_MAIN_X, _MAIN_W, _SIDE_X, _SIDE_W = 20, 300, 380, 460
_WRAP = 58
_LINE = 17


# Box labels of the flow diagram: what the patients in the box have, not the step's name.
STEP_TITLES = {
    "patients_in_extract": "Patients in the extract",
    "without_index_date": "With an index date",
    "source_population": "Source population",
    "sex": "Sex recorded",
    "alive_at_index": "Alive at index",
    "age": "In the age range",
    "history": "Enough history before index",
    "registration": "Registered long enough",
    "encounters": "Enough encounters",
    "practice": "In the chosen practices",
    "not_prevalent": "Free of the condition at index",
    "no_prior_evidence": "Without the evidence before index",
    "in_contact_at_index": "In contact at index",
    "at_risk_any_outcome": "At risk of an outcome",
    "complete_followup": "Complete follow-up",
    # a new-user study's steps (compile/_exposure.py), which come before the study's own
    "new_user": "New users: no treatment in the washout",
    "one_exposure_group": "Starting one treatment group",
    # a matched study's lines after the cohort (outputs/_matched.py); they count sets
    "match_cases": "Matched sets, one per incident case",
    "match_exposed": "Matched sets, one per new user of the group",
    "match_any_control": "Sets with at least one control",
    "match_all_controls": "Sets with every control",
}
# Lines that remove nobody by definition: drawn as a box without a side box.
DEFINING_STEPS = ("patients_in_extract", "source_population")
# What a side box counts when it is not patients excluded: a matched study's lines count sets.
SIDE_TITLES = {
    "match_cases": "Not a case:",
    "match_exposed": "Not a new user of the group:",
    "match_any_control": "No control found:",
    "match_all_controls": "Fewer controls:",
}


def flow_title(step: str) -> str:
    """The label of a flow-diagram box after ``step`` (its name, spelled out, when unknown)."""
    return STEP_TITLES.get(step, step.replace("_", " ").capitalize())


def flow_side(step: str) -> str:
    """The label of the side box of ``step``: what its removed count counts."""
    return SIDE_TITLES.get(step, "Excluded:")


def _side_count_x(label: str) -> float:
    # The count follows its label: about 8.7 px a character of the side title's bold 13 px
    # font (measured by eye on "Excluded:", whose count has always stood at +92).
    return _SIDE_X + 14 + round(8.7 * len(label))


@dataclass(frozen=True)
class FlowStep:
    """One attrition step as drawn: the step name, its description and formatted counts.

    Attributes:
        step: Step name from ``attrition.csv``.
        description: What the step requires, from ``attrition.csv``.
        before: Formatted ``patients_before`` (drawn only for a first step that removes).
        removed: Formatted ``removed``.
        remaining: Formatted ``remaining``.
        removes: Whether the step is drawn with a side box (false for a step that removes
            nobody by definition: the extract, the source population).
        title: The box's label (e.g. "Alive at index"); the step name when empty.
        side: The side box's label, before its count.
    """

    step: str
    description: str
    before: str
    removed: str
    remaining: str
    removes: bool
    title: str = ""
    side: str = "Excluded:"


def _text(x: float, y: float, content: str, cls: str, extra: str = "") -> str:
    return f'<text x="{x:g}" y="{y:g}" class="{cls}"{extra}>{escape(content)}</text>'


def _count(x: float, y: float, value: str, step: str, field: str, cls: str) -> str:
    data = f' data-step="{escape(step)}" data-field="{field}"'
    return _text(x, y, value, cls, data)


def _main_box(y: float, title: str, lines: list[str], count: tuple[str, str, str]) -> str:
    height = 52 + _LINE * len(lines)
    parts = [
        f'<rect x="{_MAIN_X}" y="{y:g}" width="{_MAIN_W}" height="{height}" rx="6" class="box"/>',
        _text(_MAIN_X + 14, y + 22, title, "box-title"),
        _count(_MAIN_X + _MAIN_W - 14, y + 22, *count, "box-count"),
    ]
    parts += [
        _text(_MAIN_X + 14, y + 44 + _LINE * i, line, "box-note") for i, line in enumerate(lines)
    ]
    return "".join(parts)


def render_flow(
    steps: Sequence[FlowStep], *, final_label: str = "Analysis cohort", cohort: int | None = None
) -> str:
    """Draw the patient flow: a column of remaining counts with exclusions to the side.

    Args:
        steps: The attrition steps in order, counts already suppressed.
        final_label: Title of the box of the analysis cohort.
        cohort: Position of the step whose box is the analysis cohort; the last by default (a
            matched study's set lines come after it).

    Returns:
        An ``<svg>`` element.
    """
    parts: list[str] = []
    y = 10.0
    centre = _MAIN_X + _MAIN_W / 2
    cohort = len(steps) - 1 if cohort is None else cohort
    for i, s in enumerate(steps):
        last = i == len(steps) - 1
        if i == 0 and s.removes:
            parts.append(_main_box(y, "Candidates", [], (s.before, s.step, "patients_before")))
            y += 52 + 36
        if s.removes:
            lines = textwrap.wrap(s.description, _WRAP) or [""]
            side_h = 34 + _LINE * len(lines)
            side_y = y - 36 - side_h / 2 + 18
            parts.append(
                f'<path d="M{centre:g} {side_y + side_h / 2:g} H{_SIDE_X}" class="link"/>'
                f'<rect x="{_SIDE_X}" y="{side_y:g}" width="{_SIDE_W}" height="{side_h:g}" '
                'rx="6" class="side"/>'
                + _text(_SIDE_X + 14, side_y + 21, s.side, "side-title")
                + _count(
                    _side_count_x(s.side), side_y + 21, s.removed, s.step, "removed", "side-count"
                )
                + "".join(
                    _text(_SIDE_X + 14, side_y + 40 + _LINE * j, line, "box-note")
                    for j, line in enumerate(lines)
                )
            )
        title = final_label if i == cohort else (s.title or s.step)
        note = textwrap.wrap(s.description, 40) if i > 0 and not s.removes else []
        parts.append(_main_box(y, title, note, (s.remaining, s.step, "remaining")))
        height = 52 + _LINE * len(note)
        if not last:
            nxt = steps[i + 1]
            gap = 36 + (34 + _LINE * len(textwrap.wrap(nxt.description, _WRAP) or [""]))
            parts.append(
                f'<path d="M{centre:g} {y + height:g} V{y + height + gap - 6:g}" class="arrow"/>'
                f'<path d="M{centre - 5:g} {y + height + gap - 8:g} l5 8 l5 -8 z" class="head"/>'
            )
            y += height + gap
        else:
            y += height
    width = _SIDE_X + _SIDE_W + 10
    return (
        f'<svg class="flow" viewBox="0 0 {width} {y + 10:g}" role="img" '
        f'aria-label="Patient flow diagram">{"".join(parts)}</svg>'
    )


@dataclass(frozen=True, eq=False)
class Curve:
    """The two cumulative-incidence estimates of one outcome, times in years.

    Attributes:
        title: Outcome title for the panel heading.
        aj_times: Aalen-Johansen step times.
        aj_values: Aalen-Johansen cumulative incidence (death competing).
        km_times: Kaplan-Meier step times.
        km_values: ``1 - KM`` with deaths censored.
        horizon: Right end of the x axis, in years.
        aj_low: Lower limit of the pointwise band at each ``aj_times`` (no band when None).
        aj_high: Upper limit of the band at each ``aj_times``.
    """

    title: str
    aj_times: NDArray[np.float64]
    aj_values: NDArray[np.float64]
    km_times: NDArray[np.float64]
    km_values: NDArray[np.float64]
    horizon: float
    aj_low: NDArray[np.float64] | None = None
    aj_high: NDArray[np.float64] | None = None


def _nice_step(value: float) -> float:
    """A round tick step at or above ``value`` (1, 2 or 5 times a power of ten)."""
    if value <= 0:
        return 0.0025
    power = 10 ** math.floor(math.log10(value))
    return next(m * power for m in (1, 2, 5, 10) if m * power >= value)


def value_axis(
    box: tuple[int, int, int, int, int, int],
    highest: float,
    step: float,
    label: Callable[[float], str],
) -> tuple[list[str], Callable[[float], float]]:
    """A plot's frame, horizontal grid and y tick labels, and its y scale.

    The curves and the rates panels share it so the two read alike; values above the top
    tick are drawn at the top.

    Args:
        box: ``(width, height, left, right, top, bottom)`` of the plot in pixels.
        highest: The largest value to show.
        step: The tick step.
        label: A tick value's text.

    Returns:
        The SVG parts drawn so far, and the function placing a value on the y axis.
    """
    w, h, left, right, top, bottom = box
    ticks = max(math.ceil(highest / step - 1e-9), 1)
    top_value = step * ticks

    def sy(v: float) -> float:
        return top + (h - top - bottom) * (1 - min(v, top_value) / top_value)

    parts = [
        f'<rect x="{left}" y="{top}" width="{w - left - right}" '
        f'height="{h - top - bottom}" class="plot"/>'
    ]
    for k in range(ticks + 1):
        v = step * k
        parts.append(f'<path d="M{left} {sy(v):.1f} H{w - right}" class="grid"/>')
        parts.append(_text(left - 6, sy(v) + 4, label(v), "tick tick-y"))
    return parts, sy


def _step_path(
    times: NDArray[np.float64],
    values: NDArray[np.float64],
    sx: Callable[[float], float],
    sy: Callable[[float], float],
) -> str:
    points = [f"M{sx(times[0]):.1f} {sy(values[0]):.1f}"]
    for t, v in zip(times[1:], values[1:], strict=True):
        points.append(f"H{sx(t):.1f}V{sy(v):.1f}")
    return "".join(points)


def _band_path(curve: Curve, sx: Callable[[float], float], sy: Callable[[float], float]) -> str:
    """The band as one closed step shape: the upper limits forwards, the lower ones back."""
    if curve.aj_low is None or curve.aj_high is None:
        return ""
    upper = _step_path(curve.aj_times, curve.aj_high, sx, sy)
    back = [f"V{sy(curve.aj_low[-1]):.1f}"]
    for i in range(curve.aj_times.size - 1, 0, -1):
        back.append(f"H{sx(curve.aj_times[i]):.1f}V{sy(curve.aj_low[i - 1]):.1f}")
    back.append(f"H{sx(curve.aj_times[0]):.1f}Z")
    return f'<path d="{upper}{"".join(back)}" class="band"/>'


def render_curves(curve: Curve) -> str:
    """Draw one outcome's Aalen-Johansen curve (solid, with its band) and ``1 - KM`` (dashed).

    Args:
        curve: The estimates.

    Returns:
        An ``<svg>`` element.
    """
    w, h, left, right, top, bottom = 360, 250, 52, 14, 14, 40
    band_top = curve.aj_high.max() if curve.aj_high is not None else 0.0
    highest = float(max(curve.aj_values.max(), curve.km_values.max(), band_top))
    horizon = max(curve.horizon, 1e-9)

    def sx(t: float) -> float:
        return left + (w - left - right) * min(t, horizon) / horizon

    box = (w, h, left, right, top, bottom)
    parts, sy = value_axis(box, highest, _nice_step(highest / 4), lambda v: f"{100 * v:.4g}%")
    for year in range(math.floor(horizon) + 1):
        parts.append(f'<path d="M{sx(year):.1f} {h - bottom} v5" class="axis"/>')
        parts.append(_text(sx(year), h - bottom + 18, str(year), "tick tick-x"))
    parts.append(_text((left + w - right) / 2, h - 4, "Years since index", "axis-label"))
    parts.append(_band_path(curve, sx, sy))
    km = _step_path(curve.km_times, curve.km_values, sx, sy)
    aj = _step_path(curve.aj_times, curve.aj_values, sx, sy)
    parts.append(f'<path d="{km}" class="km"/><path d="{aj}" class="aj"/>')
    label = f"Cumulative incidence of {curve.title}"
    return (
        f'<svg class="curve" viewBox="0 0 {w} {h}" role="img" aria-label="{escape(label)}">'
        f"{''.join(parts)}</svg>"
    )


@dataclass(frozen=True)
class Bar:
    """One bar of the combinations chart.

    Attributes:
        label: Combination label (outcome titles joined by " + ").
        value: The count, or None when suppressed (no bar is drawn, only the label).
        shown: The formatted count to print beside the bar.
    """

    label: str
    value: int | None
    shown: str


def render_bars(bars: Sequence[Bar]) -> str:
    """Draw a horizontal bar chart; suppressed counts get a label but no bar.

    Labels sit above their bars so that long condition titles never get clipped.

    Args:
        bars: Bars in display order.

    Returns:
        An ``<svg>`` element.
    """
    width, bar_w, row = 900, 780, 44
    top = max((b.value or 0 for b in bars), default=0) or 1
    parts = []
    for i, b in enumerate(bars):
        y = 4 + i * row
        parts.append(_text(0, y + 14, b.label, "bar-label"))
        length = 0.0 if b.value is None else max(bar_w * b.value / top, 1.5)
        if length:
            parts.append(
                f'<rect x="0" y="{y + 20}" width="{length:.1f}" height="16" rx="2" class="bar"/>'
            )
        parts.append(_text(length + 8, y + 33, b.shown, "bar-value"))
    height = 8 + row * len(bars)
    return (
        f'<svg class="bars" viewBox="0 0 {width} {height}" role="img" '
        f'aria-label="Outcome combinations">{"".join(parts)}</svg>'
    )
