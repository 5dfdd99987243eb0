"""`shardmill scale --layouts 1x2,2x1`: one node's cores split into ranks × threads, each split timed, the best named.

Each layout P×T runs the scaling worker on P processes with ``run.threads = T`` (the job's global batch at every
layout), through the same ``driver.run_point`` as the process-count study. Per layout: samples/s (G · steps over
the slowest rank's wall time of the timed steps), the largest rank's resident memory and the node's (the sum over
its ranks), and, when 1×1 is among the layouts, the efficiency per core, samples/s / (P·T · samples/s of 1×1).
The recommendation is the layout with the most samples/s; ``layouts.json`` in the output folder holds it all.
"""

from __future__ import annotations

import json
import re
from collections.abc import Callable
from pathlib import Path
from typing import Any

from shardmill.config import Job
from shardmill.errors import JobError

LAYOUT = re.compile(r"^\s*(\d+)\s*[x×]\s*(\d+)\s*$")


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
            "resident_mib_per_rank": max(rss) / 2**20, "resident_mib_per_node": sum(rss) / 2**20}


def compare_layouts(job: Job, layouts: list[tuple[int, int]], steps: int, out: Path,
                    run_point: Callable[[int, int, str], dict[str, Any]]) -> dict[str, Any]:
    """Run every layout (``run_point(P, T, tag)`` returns the worker's record), rank them, write layouts.json."""
    rows = [layout_row(P, T, run_point(P, T, f"p{P}t{T}")) for P, T in layouts]
    serial = next((row["samples_per_s"] for row in rows if row["cores"] == 1), None)
    for row in rows:
        row["efficiency_per_core"] = None if serial is None else row["samples_per_s"] / (row["cores"] * serial)
    best = max(rows, key=lambda row: (row["samples_per_s"], -row["resident_mib_per_node"]))
    result = {"layers": job.model.layers, "global_batch": job.run.global_batch, "steps": steps,
              "reduction": job.run.reduction, "layouts": rows, "best": best["layout"],
              "recommendation": recommendation(best)}
    (out / "layouts.json").write_text(json.dumps(result, indent=1, allow_nan=False) + "\n")
    return result


def recommendation(best: dict[str, Any]) -> str:
    """The best layout in words, with the batch system's request for it."""
    return (f"{best['layout']}: {best['samples_per_s']:,.0f} samples/s, {best['resident_mib_per_node']:,.0f} MiB "
            f"resident per node; ask for it with `--ntasks-per-node={best['processes']} "
            f"--cpus-per-task={best['threads']}` and run.threads = {best['threads']}")


def text_table(result: dict[str, Any]) -> str:
    """The layouts as aligned lines, then the recommendation."""
    lines = [f"{'layout':>7} {'samples/s':>11} {'step ms':>9} {'eff/core':>9} {'MiB/rank':>9} {'MiB/node':>9}"]
    for row in result["layouts"]:
        efficiency = "" if row["efficiency_per_core"] is None else f"{row['efficiency_per_core']:.3f}"
        lines.append(f"{row['layout']:>7} {row['samples_per_s']:>11,.0f} {row['step_ms']:>9.2f} {efficiency:>9} "
                     f"{row['resident_mib_per_rank']:>9.0f} {row['resident_mib_per_node']:>9.0f}")
    lines.append(f"best layout {result['recommendation']}")
    return "\n".join(lines)
