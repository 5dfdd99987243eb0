"""A study's picture, ``variants.png``: the chosen metric against each varied key, and the curves of the best few.

One panel per varied key (at most four): every finished variant's best value of the plan's metric at its value of
the key (numbers on a numeric axis, anything else as labelled positions), the best variant ringed; and one panel of
the metric per epoch for the best :data:`CURVES` variants, read from their own metrics.jsonl. Drawn on matplotlib's
Agg canvas (no display), as ``shardmill curves`` draws.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from shardmill.study.plan import Plan, workdir

CURVES = 3
"""Variants whose metric per epoch the last panel draws (the best ones)."""
KEYS = 4
"""Varied keys drawn at most (the first ones of the plan)."""


def _number(text: str) -> float | None:
    try:
        return float(text)
    except ValueError:
        return None


def epochs_of(metrics: Path, metric: str) -> tuple[list[int], list[float]]:
    """(epochs, values) of ``metric`` over a run's metrics.jsonl, the later record of an epoch kept."""
    section, name = metric.split(".")
    seen: dict[int, float] = {}
    try:
        lines = metrics.read_text().splitlines()
    except OSError:
        return [], []
    for line in lines:
        try:
            record = json.loads(line)
        except json.JSONDecodeError:
            continue
        value = record.get(section, {}).get(name) if record.get("kind") == "epoch" else None
        if isinstance(value, (int, float)) and isinstance(record.get("epoch"), int):
            seen[record["epoch"]] = float(value)
    epochs = sorted(seen)
    return epochs, [seen[e] for e in epochs]


def draw(plan: Plan, results: dict[str, Any]) -> Path | None:
    """Write ``variants.png`` in the study folder; returns its path, or None when no variant has finished."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    done = [row for row in results["variants"] if row["status"] == "done" and row["best"] is not None]
    if not done:
        return None
    keys = list(plan.varied)[:KEYS]
    panels = len(keys) + 1
    figure = Figure(figsize=(4.2 * panels, 3.6), layout="constrained")
    FigureCanvasAgg(figure)
    axes = figure.subplots(1, panels, squeeze=False)[0]
    best = done[0]
    for axis, key in zip(axes, keys, strict=False):
        texts = [row[key] for row in done]
        numbers = [_number(t) for t in texts]
        if all(n is not None for n in numbers):
            xs = numbers
        else:  # labelled positions, in the order first seen
            order = list(dict.fromkeys(texts))
            xs = [order.index(t) for t in texts]
            axis.set_xticks(range(len(order)), order, rotation=30, ha="right")
        axis.plot(xs, [row["best"] for row in done], "o", color="#2a6f97", alpha=0.8)
        axis.plot([xs[0]], [best["best"]], "o", markersize=13, markerfacecolor="none", markeredgecolor="#c8553d")
        if all(n is not None and n > 0 for n in numbers) and max(numbers) > 20 * min(numbers):
            axis.set_xscale("log")
        axis.set_xlabel(key)
        axis.set_ylabel(f"best {plan.metric}")
        axis.grid(alpha=0.3)
    curves = axes[-1]
    for row in done[:CURVES]:
        epochs, values = epochs_of(workdir(plan, next(v for v in plan.variants if v.name == row["variant"]))
                                   / "metrics.jsonl", plan.metric)
        curves.plot(epochs, values, marker=".", label=f"{row['place']}. {row['variant']}")  # epochs count from 1
    curves.set_xlabel("epoch")
    curves.set_ylabel(plan.metric)
    curves.set_title(f"the best {min(CURVES, len(done))}", fontsize=10)
    curves.legend(fontsize=8)
    curves.grid(alpha=0.3)
    figure.suptitle(f"{len(done)} variants, ranked by {plan.metric}", fontsize=11)
    path = plan.folder / "variants.png"
    partial = path.with_name(f".{path.name}.partial")
    figure.savefig(partial, format="png", dpi=100)
    partial.replace(path)
    return path
