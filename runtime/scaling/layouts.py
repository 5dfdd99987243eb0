"""`shardmill scale --layouts 1x2,2x1`: one node's cores split into ranks × threads, each split timed, the best named.

Each layout P×T runs the scaling worker on P processes with ``run.threads = T`` (the job's global batch at every
layout), through the same ``driver.run_point`` as the process-count study. Per layout: samples/s (G · steps over
the slowest rank's wall time of the timed steps), the largest rank's resident memory and the node's (the sum over
its ranks), and, when 1×1 is among the layouts, the efficiency per core, samples/s / (P·T · samples/s of 1×1).
The recommendation is the layout with the most samples/s; ``layouts.json`` in the output folder holds it all.

With node counts to project to (``--project-nodes``), the threaded compute term is fitted to the layouts of one
process and every layout is projected to those node counts (``layoutmodel.py``): the "projection" entry of
layouts.json, a second table, and the best layout at the largest node count in the recommendation.
"""

from __future__ import annotations

import json
import re
from collections.abc import Callable
from pathlib import Path
from typing import Any

from shardmill.config import Job
from shardmill.errors import JobError
from shardmill.scaling.layoutmodel import layout_projection

OTHER_LOAD_LIMIT = 0.10
"""Above this share of the cores used by other processes during a layout's run, the table warns: measured on the
2-core VM, 1×2 of 64-256-256-4 ran 5× slower than 1×1 while a test suite ran beside it, 1.14× faster on idle cores
(benchmarks/README.md)."""

LAYOUT = re.compile(r"^\s*(\d+)\s*[x×]\s*(\d+)\s*$")

FIT_ERROR_LIMIT = 0.15
"""Largest |model − measured| / measured compute of a one-process layout before the projection table warns."""


def parse_layouts(text: str) -> list[tuple[int, int]]:
    """``--layouts`` such as "1x2,2x1" as distinct (processes, threads) pairs in the given order; JobError if not."""
    layouts: list[tuple[int, int]] = []
    for part in str(text).split(","):
        found = LAYOUT.match(part)
        if found is None or min(int(found[1]), int(found[2])) < 1:
            raise JobError(f"`--layouts` must be comma-separated PxT pairs with P, T ≥ 1 like 1x2,2x1; got {text!r}")
        layout = (int(found[1]), int(found[2]))
        if layout not in layouts:
            layouts.append(layout)
    return layouts


def layout_row(P: int, T: int, raw: dict[str, Any]) -> dict[str, Any]:
    """One layout's figures from the worker's record (``scaling/worker.py``)."""
    wall = max(rank["wall_s"] for rank in raw["ranks"])
    rss = [rank["rss_bytes"] for rank in raw["ranks"]]
    return {"layout": f"{P}x{T}", "processes": P, "threads": T, "cores": P * T,
            "samples_per_s": raw["global_batch"] * raw["steps"] / wall, "step_ms": 1e3 * wall / raw["steps"],
            "resident_mib_per_rank": max(rss) / 2**20, "resident_mib_per_node": sum(rss) / 2**20,
            "other_load": raw.get("other_load")}


def compare_layouts(job: Job, layouts: list[tuple[int, int]], steps: int, out: Path,
                    run_point: Callable[[int, int, str], dict[str, Any]], nodes: list[int] | None = None,
                    network: tuple[float, float] | None = None, network_spec: str | None = None) -> dict[str, Any]:
    """Run every layout (``run_point(P, T, tag)`` returns the worker's record), rank them, write layouts.json.

    nodes: node counts to project every layout to (``layoutmodel.layout_projection``, with ``network``, (alpha
    seconds, beta seconds per byte), when given); None: no projection.
    """
    raws = {(P, T): run_point(P, T, f"p{P}t{T}") for P, T in layouts}
    rows = [layout_row(P, T, raw) for (P, T), raw in raws.items()]
    serial = next((row["samples_per_s"] for row in rows if row["cores"] == 1), None)
    for row in rows:
        row["efficiency_per_core"] = None if serial is None else row["samples_per_s"] / (row["cores"] * serial)
    best = max(rows, key=lambda row: (row["samples_per_s"], -row["resident_mib_per_node"]))
    result = {"layers": job.model.layers, "global_batch": job.run.global_batch, "steps": steps,
              "reduction": job.run.reduction, "layouts": rows, "best": best["layout"]}
    projection = None
    if nodes is not None:
        projection = layout_projection(job, raws, nodes, network, network_spec)
        for row in projection.get("rows", []):
            if row["nodes"] == 1:  # measured on this node: how far the model is from it
                measured = next(r for r in rows if r["layout"] == row["layout"])["step_ms"] / 1e3
                row["measured_step_s"] = measured
                row["step_error"] = (row["step_s"] - measured) / measured
        result["projection"] = projection
    result["recommendation"] = recommendation(best, projection)
    (out / "layouts.json").write_text(json.dumps(result, indent=1, allow_nan=False) + "\n")
    return result


def recommendation(best: dict[str, Any], projection: dict[str, Any] | None = None) -> str:
    """The best layout in words, with the batch system's request for it, and the projected best at the largest
    node count when there is a projection."""
    text = (f"{best['layout']}: {best['samples_per_s']:,.0f} samples/s, {best['resident_mib_per_node']:,.0f} MiB "
            f"resident per node; ask for it with `--ntasks-per-node={best['processes']} "
            f"--cpus-per-task={best['threads']}` and run.threads = {best['threads']}")
    if projection and projection["available"] and projection["best"]:
        largest = max(int(nodes) for nodes in projection["best"])  # the largest node count some layout can run at
        layout = projection["best"][str(largest)]
        row = next(r for r in projection["rows"] if r["nodes"] == largest and r["layout"] == layout)
        text += (f"; projected to {largest} nodes the best is {layout} ({row['samples_per_s']:,.0f} samples/s, "
                 f"efficiency per core {row['efficiency_per_core']:.3f})")
    return text


def text_table(result: dict[str, Any]) -> str:
    """The layouts as aligned lines, the projection's (when there is one), then the recommendation."""
    lines = [f"{'layout':>7} {'samples/s':>11} {'step ms':>9} {'eff/core':>9} {'MiB/rank':>9} {'MiB/node':>9}"]
    for row in result["layouts"]:
        efficiency = "" if row["efficiency_per_core"] is None else f"{row['efficiency_per_core']:.3f}"
        lines.append(f"{row['layout']:>7} {row['samples_per_s']:>11,.0f} {row['step_ms']:>9.2f} {efficiency:>9} "
                     f"{row['resident_mib_per_rank']:>9.0f} {row['resident_mib_per_node']:>9.0f}")
    busy = [row for row in result["layouts"] if (row.get("other_load") or 0.0) > OTHER_LOAD_LIMIT]
    if busy:
        worst = max(busy, key=lambda row: row["other_load"])
        lines.append(f"warning: other processes used {100 * worst['other_load']:.0f}% of the cores while "
                     f"{', '.join(row['layout'] for row in busy)} ran (limit {100 * OTHER_LOAD_LIMIT:.0f}%): a "
                     f"process with several threads loses most to that; rerun on idle cores")
    projection = result.get("projection")
    if projection is not None:
        lines += projection_lines(projection)
    lines.append(f"best layout {result['recommendation']}")
    return "\n".join(lines)


def projection_lines(projection: dict[str, Any]) -> list[str]:
    """The projection to many nodes as aligned lines (or why there is none), the best layout per node count."""
    if not projection["available"]:
        return [f"no projection to many nodes: {projection['reason']}"]
    fit = projection["fit"]
    lines = [f"projected to more nodes (strong scaling, G = {projection['global_batch']}; threaded compute: serial "
             f"fraction {fit['serial_fraction']:.3f}; network {projection['network']['name']}; * extrapolated T; "
             f"! more ranks than rows, cannot run)",
             f"{'nodes':>7} {'layout':>7} {'ranks':>7} {'step ms':>9} {'samples/s':>11} {'eff/core':>9}"]
    for row in projection["rows"]:
        mark = "!" if not row.get("runnable", True) else "*" if row["extrapolated"] else " "
        lines.append(f"{row['nodes']:>7} {row['layout']:>7} {row['ranks']:>7} {1e3 * row['step_s']:>9.2f} "
                     f"{row['samples_per_s']:>11,.0f} {row['efficiency_per_core']:>9.3f}{mark}")
    lines.append("best per node count: " + ", ".join(f"{n}: {layout}" for n, layout in projection["best"].items()))
    worst = max(abs(point["relative_error"]) for point in fit["points"])
    if worst > FIT_ERROR_LIMIT:
        lines.append(f"warning: the threaded compute term misses a measured one-process layout by {100 * worst:.0f}% "
                     f"(limit {100 * FIT_ERROR_LIMIT:.0f}%); treat the projected rows as rough")
    return lines
