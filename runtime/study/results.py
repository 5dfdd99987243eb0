"""A study's results: each variant's record (``variant.json`` in its workdir), and the ranked table of them all.

The record is written by the rank that leads the variant's group when the variant ends (done, failed, or stopped by
a signal); a relaunched study reads the records to know what is finished. The table (``variants.csv``,
``variants.json`` in the study folder) has one row per variant, ranked by the plan's metric, and for k-fold plans one
row per setting with the folds' mean and spread.
"""

from __future__ import annotations

import csv
import json
import math
import os
import statistics
from pathlib import Path
from typing import Any

from shardmill.study.plan import Plan, Variant, workdir
from shardmill.training.best import HIGHER_IS_BETTER

RECORD = "variant.json"
FINISHED = ("done", "failed")  # a relaunched study skips these; "stopped" (by a signal) ones continue


def metric_values(metrics: Path, metric: str) -> tuple[float | None, float | None, int]:
    """(best, final, epochs) of ``metric`` (a path such as "validation.loss") over a run's metrics.jsonl.

    An epoch logged twice (a run stopped after its epoch record and before its checkpoint, then resumed) counts
    once, its later record kept. Missing file or metric: (None, None, epochs).
    """
    section, name = metric.split(".")
    epochs: dict[int, float | None] = {}
    try:
        lines = metrics.read_text().splitlines()
    except OSError:
        return None, None, 0
    for line in lines:
        try:
            record = json.loads(line)
        except json.JSONDecodeError:
            continue  # a line cut short by a kill
        if record.get("kind") == "epoch":
            value = record.get(section, {}).get(name)
            epochs[int(record["epoch"])] = float(value) if isinstance(value, (int, float)) else None
    values = [epochs[e] for e in sorted(epochs) if epochs[e] is not None and math.isfinite(epochs[e])]
    if not values:
        return None, None, len(epochs)
    best = max(values) if HIGHER_IS_BETTER[name] else min(values)
    return best, values[-1], len(epochs)


def write_record(plan: Plan, variant: Variant, status: str, reason: str, wall_s: float, ranks: int) -> dict:
    """Write the variant's record (atomically), adding the wall time of earlier launches; returns it."""
    folder = workdir(plan, variant)
    earlier = read_record(plan, variant) or {}
    best, final, epochs = metric_values(folder / "metrics.jsonl", plan.metric)
    record = {"name": variant.name, "index": variant.index, "sets": list(variant.sets), "status": status,
              "reason": reason, "metric": plan.metric, "best": best, "final": final, "epochs": epochs,
              "wall_s": earlier.get("wall_s", 0.0) + wall_s,
              "rank_s": earlier.get("rank_s", 0.0) + wall_s * ranks, "ranks": ranks}
    folder.mkdir(parents=True, exist_ok=True)
    partial = folder / (RECORD + ".partial")
    partial.write_text(json.dumps(record, indent=1) + "\n")
    os.replace(partial, folder / RECORD)
    return record


def read_record(plan: Plan, variant: Variant) -> dict[str, Any] | None:
    """The variant's record, or None when it never ended (never started, or killed without a record)."""
    try:
        record = json.loads((workdir(plan, variant) / RECORD).read_text())
    except (OSError, json.JSONDecodeError):
        return None
    return record if record.get("sets") == list(variant.sets) else None


def _rank_key(plan: Plan, value: float | None) -> tuple[int, float]:
    higher = HIGHER_IS_BETTER[plan.metric.split(".")[1]]
    return (1, 0.0) if value is None else (0, -value if higher else value)


def table(plan: Plan) -> dict[str, Any]:
    """The study's results: ``variants`` (one row per variant, ranked; unfinished ones last) and ``settings`` (per
    setting over its folds: count, mean and spread (sample standard deviation) of the best metric; ranked)."""
    rows = []
    for variant in plan.variants:
        record = read_record(plan, variant) or {}
        values = dict(text.split("=", 1) for text in variant.sets)
        rows.append({"variant": variant.name, **{key: values.get(key, "") for key in plan.varied},
                     "status": record.get("status", "pending"), "best": record.get("best"),
                     "final": record.get("final"), "epochs": record.get("epochs", 0),
                     "wall_s": record.get("wall_s", 0.0), "rank_s": record.get("rank_s", 0.0),
                     "reason": record.get("reason", ""), "sets": list(variant.sets),
                     "setting": list(variant.setting)})
    rows.sort(key=lambda row: (row["status"] != "done", *_rank_key(plan, row["best"])))
    for position, row in enumerate(rows, start=1):
        row["place"] = position
    settings: dict[tuple[str, ...], list[float]] = {}
    for row in rows:
        settings.setdefault(tuple(row["setting"]), [])
        if row["status"] == "done" and row["best"] is not None:
            settings[tuple(row["setting"])].append(row["best"])
    summary = [{"setting": list(name), "runs": len(values), "mean": statistics.fmean(values) if values else None,
                "spread": statistics.stdev(values) if len(values) > 1 else None} for name, values in settings.items()]
    summary.sort(key=lambda row: _rank_key(plan, row["mean"]))
    return {"metric": plan.metric, "variants": rows, "settings": summary}


def write_tables(plan: Plan, results: dict[str, Any], usage: dict[str, Any]) -> list[Path]:
    """``variants.json`` (everything, with the allocation's use) and ``variants.csv`` (the variant rows) in the
    study folder; written atomically. Returns their paths."""
    plan.folder.mkdir(parents=True, exist_ok=True)
    out_json, out_csv = plan.folder / "variants.json", plan.folder / "variants.csv"
    partial = out_json.with_suffix(".json.partial")
    partial.write_text(json.dumps({**results, "allocation": usage}, indent=1) + "\n")
    os.replace(partial, out_json)
    columns = ["place", "variant", *plan.varied, "status", "best", "final", "epochs", "wall_s", "rank_s", "reason"]
    partial = out_csv.with_suffix(".csv.partial")
    with open(partial, "w", newline="") as out:
        writer = csv.DictWriter(out, fieldnames=columns, extrasaction="ignore")
        writer.writeheader()
        writer.writerows(results["variants"])
    os.replace(partial, out_csv)
    return [out_csv, out_json]


def best_line(plan: Plan, results: dict[str, Any], job: str) -> str | None:
    """The best setting (mean over folds) or variant, and the ``shardmill train`` line that trains it alone."""
    import shlex

    if plan.folds and results["settings"] and results["settings"][0]["mean"] is not None:
        top = results["settings"][0]
        sets = top["setting"]
        spread = f" ± {top['spread']:.6g}" if top["spread"] is not None else ""
        what = f"best setting: {plan.metric} {top['mean']:.6g}{spread} over {top['runs']} folds"
    else:
        done = [row for row in results["variants"] if row["status"] == "done" and row["best"] is not None]
        if not done:
            return None
        top = done[0]
        sets = top["sets"]
        what = f"best variant {top['variant']}: {plan.metric} {top['best']:.6g} (final {top['final']:.6g})"
    line = " ".join(f"--set {shlex.quote(text)}" for text in sets)
    return f"{what}; train it alone: shardmill train {shlex.quote(job)} {line}".rstrip()
