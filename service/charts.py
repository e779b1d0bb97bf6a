"""Showing a ledger: a table for the terminal (rich) and charts for files (matplotlib).

:func:`ledger_table` renders a stream's ledger, and the comparison with its serving learner when
given, as one row per learner. :func:`draw` charts a replay: one figure per stream, one panel per
learner. The solid line is the quantity the learner's ceiling bounds (its updates, or its
label-time mistakes where the ceiling says so), the dashed line the ceiling as it stood at each
moment (it moves with live inputs such as the largest item norm or the best rule's mistakes), the
thin grey line the served mistakes. A red marker is an alert (the learner went past its ceiling or
was contradicted), a dotted vertical line a new epoch (the stream's policy restarted the learner),
and a dashed vertical line a moment the caller names (for the demo, the planted rule change).
Written as PNG and SVG with matplotlib's Agg renderer, without pyplot, so nothing global is
touched.
"""

from __future__ import annotations

import math
import os
from collections import Counter
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from rich import box
from rich.console import Console
from rich.table import Table
from rich.text import Text


@dataclass
class Point:
    """One learner's ledger at one moment of a replay (after ``labels`` applied labels)."""

    labels: int
    counted: int
    served: int
    ceiling: float | None
    epoch: int


@dataclass
class AlertMark:
    """An alert as the replay saw it: where (in labels), on what count, in which state."""

    learner: str
    state: str
    labels: int
    count: float
    ceiling: float | None


@dataclass
class StreamChart:
    """What one stream's figure shows."""

    stream: str
    learners: dict[str, list[Point]]
    kinds: dict[str, str] = field(default_factory=dict)
    counts: dict[str, str] = field(default_factory=dict)  # learner -> "updates" | "mistakes"
    states: dict[str, str] = field(default_factory=dict)
    alerts: list[AlertMark] = field(default_factory=list)
    marks: list[tuple[int, str]] = field(default_factory=list)  # (labels, caption)
    serve: str | None = None


STATE_COLOURS = {
    "within": "#2e7d32",
    "near": "#ef6c00",
    "exceeded": "#c62828",
    "contradicted": "#6a1b9a",
}


def draw(chart: StreamChart, out_dir: Path, formats: Sequence[str] = ("png", "svg")) -> list[Path]:
    """Draw ``chart`` into ``<out_dir>/<stream>.<format>`` for each format; return the paths."""
    from matplotlib.figure import Figure

    names = list(chart.learners)
    columns = min(3, max(1, len(names)))
    rows = max(1, math.ceil(len(names) / columns))
    figure = Figure(figsize=(4.6 * columns, 3.2 * rows + 0.6), layout="constrained")
    axes = figure.subplots(rows, columns, squeeze=False)
    for position, ax in enumerate(axes.flat):
        if position >= len(names):
            ax.set_visible(False)
            continue
        name = names[position]
        _panel(ax, chart, name)
    figure.suptitle(f"{chart.stream}: counted mistakes against ceilings", fontsize=12)
    figure.legend(handles=_legend(chart), loc="outside lower center", ncols=6, fontsize=8)
    out_dir.mkdir(parents=True, exist_ok=True)
    paths = []
    for fmt in formats:
        path = out_dir / f"{chart.stream}.{fmt}"
        metadata = {"Date": None} if fmt == "svg" else None
        figure.savefig(path, format=fmt, dpi=110, metadata=metadata)
        paths.append(path)
    return paths


def _panel(ax: object, chart: StreamChart, name: str) -> None:
    from matplotlib.axes import Axes

    assert isinstance(ax, Axes)
    points = chart.learners[name]
    counts = chart.counts.get(name, "updates")
    state = chart.states.get(name, "within")
    top_count = max([1] + [p.counted for p in points] + [p.served for p in points])
    ceilings = [p.ceiling for p in points if p.ceiling is not None]
    # Keep the counts readable when a ceiling is far above them; the title says when it is cut.
    limit = 4 * top_count + 10
    top = max(top_count, min(max(ceilings, default=0.0), limit)) * 1.12
    for segment in _epochs(points):
        xs = [p.labels for p in segment]
        ax.plot(xs, [p.counted for p in segment], color="#1565c0", linewidth=1.8)
        ax.plot(xs, [p.served for p in segment], color="#9e9e9e", linewidth=0.9)
        cx = [p.labels for p in segment if p.ceiling is not None]
        cy = [min(float(p.ceiling), top) for p in segment if p.ceiling is not None]
        if cx:
            ax.step(cx, cy, where="post", color="#c62828", linestyle="--", linewidth=1.2)
    for p, q in zip(points, points[1:], strict=False):
        if q.epoch != p.epoch:
            ax.axvline(q.labels, color="#616161", linestyle=":", linewidth=1.0)
    for labels, caption in chart.marks:
        ax.axvline(labels, color="#6a1b9a", linestyle="--", linewidth=0.9, alpha=0.7)
        ax.annotate(
            caption,
            (labels, top * 0.97),
            fontsize=7,
            color="#6a1b9a",
            rotation=90,
            ha="right",
            va="top",
        )
    for alert in chart.alerts:
        if alert.learner == name:
            ax.plot(
                [alert.labels],
                [min(alert.count, top)],
                marker="v",
                markersize=9,
                color=STATE_COLOURS.get(alert.state, "#c62828"),
                linestyle="none",
            )
    serving = " [serving]" if name == chart.serve else ""
    cut = " (ceiling cut)" if ceilings and max(ceilings) > limit else ""
    none = " (no ceiling claimed)" if not ceilings else ""
    ax.set_title(
        f"{name}{serving}: {state}{cut}{none}",
        fontsize=9,
        color=STATE_COLOURS.get(state, "black"),
    )
    ax.set_xlabel("labels", fontsize=8)
    ax.set_ylabel(counts, fontsize=8)
    ax.set_ylim(0, top)
    ax.tick_params(labelsize=7)
    ax.grid(alpha=0.25)


def _legend(chart: StreamChart) -> list[object]:
    from matplotlib.lines import Line2D

    handles: list[object] = [
        Line2D([], [], color="#1565c0", linewidth=1.8, label="counted by the ceiling"),
        Line2D([], [], color="#c62828", linestyle="--", label="ceiling"),
        Line2D([], [], color="#9e9e9e", linewidth=0.9, label="served mistakes"),
        Line2D([], [], color="#c62828", marker="v", linestyle="none", label="alert"),
        Line2D([], [], color="#616161", linestyle=":", label="new epoch"),
    ]
    for caption in dict.fromkeys(caption for _, caption in chart.marks):
        handles.append(Line2D([], [], color="#6a1b9a", linestyle="--", label=caption))
    return handles


def _epochs(points: list[Point]) -> list[list[Point]]:
    segments: list[list[Point]] = []
    for p in points:
        if not segments or segments[-1][-1].epoch != p.epoch:
            segments.append([])
        segments[-1].append(p)
    return segments


# -- the table --------------------------------------------------------------------------------


def console() -> Console:
    """A console for tables: the terminal's width, or 160 columns when writing to a file or pipe
    (rich would use 80 there, too narrow for a ledger) unless COLUMNS says otherwise."""
    found = Console()
    if found.is_terminal or os.environ.get("COLUMNS"):
        return found
    return Console(width=160)


def ledger_table(
    ledger: Mapping[str, Any], compare: Mapping[str, Any] | None = None, title: str | None = None
) -> Table:
    """One row per learner: counts, ceilings, state and alerts, and the comparison if given.

    The ceiling column shows the bound on the quantity it counts (updates unless it says
    mistakes); "vs serving" is how often only this learner, and only the serving one, was wrong
    on the same labelled items, with the exact McNemar p-value of that difference.
    """
    serve = ledger.get("serve")
    table = Table(
        title=title or f"stream {ledger.get('stream', '?')}",
        title_justify="left",
        box=box.SIMPLE_HEAD,
    )
    table.add_column("learner", no_wrap=True)
    table.add_column("kind", no_wrap=True)
    table.add_column("served\nmistakes", justify="right")
    table.add_column("updates", justify="right")
    table.add_column("ceiling", justify="right")
    table.add_column("served\nceiling", justify="right")
    table.add_column("state", no_wrap=True)
    table.add_column("alerts")
    rows = {row.get("name"): row for row in (compare or {}).get("learners", [])}
    if compare is not None:
        table.add_column("vs serving: only it /\nonly served wrong, p", justify="right")
    for learner in ledger.get("learners", []):
        name = str(learner.get("name"))
        epoch = int(learner.get("epoch") or 0)
        label = name + (" *" if name == serve else "") + (f" (epoch {epoch})" if epoch else "")
        ceiling = learner.get("ceiling") or {}
        state = str(learner.get("state", ""))
        cells: list[str | Text] = [
            Text(label, style="bold" if name == serve else ""),
            str(learner.get("kind", "")),
            str(learner.get("served_mistakes", "")),
            str(learner.get("updates", "")),
            _ceiling_text(ceiling),
            _number(learner.get("served_ceiling")),
            Text(state, style=STATE_COLOURS.get(state, "")),
            _alerts_text(learner),
        ]
        if compare is not None:
            row = rows.get(name, {})
            versus = (
                f"{row.get('only_this_wrong', '?')} / {row.get('only_served_wrong', '?')}, "
                f"p {_p_value(row.get('p_value'))}"
            )
            cells.append("" if name == serve else versus)
        table.add_row(*cells)
    pending = ledger.get("pending")
    if pending is not None:
        table.caption = (
            f"* serving learner. Labels pending: {pending}, expired: {ledger.get('expired', 0)}; "
            f"most labels outstanding at an update: {ledger.get('max_outstanding', 0)}."
        )
        table.caption_justify = "left"
    return table


def _number(value: Any) -> str:
    if value is None:
        return "-"
    if isinstance(value, int) or (isinstance(value, float) and value.is_integer()):
        return f"{int(value):,}"
    return f"{value:,.1f}" if isinstance(value, float) else str(value)


def _ceiling_text(ceiling: Mapping[str, Any]) -> str:
    value = ceiling.get("value")
    counts = ceiling.get("counts", "updates")
    if value is None:
        margin = (ceiling.get("implied") or {}).get("max_margin")
        return "none" + (f" (margin <= {margin:.3g})" if margin is not None else "")
    return _number(value) + ("" if counts == "updates" else f" {counts}")


def _alerts_text(learner: Mapping[str, Any]) -> str:
    alerts = list(learner.get("alerts") or [])
    for epoch in learner.get("epochs") or []:
        if isinstance(epoch, Mapping):
            alerts.extend(epoch.get("alerts") or [])
    if not alerts:
        return ""
    states = Counter(str(a.get("state")) for a in alerts)
    return ", ".join(f"{n} {state}" for state, n in states.items())


def _p_value(value: Any) -> str:
    if value is None:
        return "-"
    return f"{value:.2g}" if value >= 0.001 else f"{value:.1e}"
