"""Rendering a scaling study (the dict of `study.build_study`): the printed table, PNG figures and report.md.

Figures need matplotlib (the optional `plots` extra); without it they are skipped with a note and the
report is written all the same. Figures are drawn on `matplotlib.figure.Figure` directly (no pyplot, no
global state), so rendering works on machines without a display.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

from shardmill.scaling import costmodel
from shardmill.timing import PHASES

PHASE_COLOURS = {"data": "#8c6d31", "forward": "#3a6ea5", "backward": "#7fa7d1", "exchange": "#c8553d",
                 "update": "#6a994e"}
"""One colour per phase of the step, the same in every figure."""

FIGURES = {"scaling.png": "Speedup and parallel efficiency against P",
           "breakdown.png": "Seconds per step by phase (mean over ranks)",
           "allreduce.png": "Allreduce time against message size, measured and fitted"}
"""File name → caption of each figure `render` draws."""

NO_PLOTS = "plots skipped: matplotlib is not installed (pip install 'shardmill[plots]')"


# --------------------------------------------------------------------------------------------------------
# Units
# --------------------------------------------------------------------------------------------------------


def seconds(value: float | None) -> str:
    """A duration in seconds written with a unit that keeps 3 significant digits: '1.23 ms', '45.6 µs'."""
    if value is None or not math.isfinite(value):
        return "–"
    for unit, scale in (("s", 1.0), ("ms", 1e-3), ("µs", 1e-6)):
        if abs(value) >= scale:
            return f"{value / scale:.3g} {unit}"
    return f"{value / 1e-9:.3g} ns"


def size(n_bytes: float | None) -> str:
    """Bytes in binary units: '4 KiB', '1.5 MiB'."""
    if n_bytes is None:
        return "–"
    for unit, scale in (("GiB", 1 << 30), ("MiB", 1 << 20), ("KiB", 1 << 10)):
        if n_bytes >= scale:
            return f"{n_bytes / scale:.3g} {unit}"
    return f"{int(n_bytes)} B"


def percent(fraction: float | None) -> str:
    """A fraction as a signed percentage: '+3.2%'."""
    return "–" if fraction is None else f"{100.0 * fraction:+.1f}%"


def share(fraction: float | None) -> str:
    """A fraction as a percentage ('73%', '4.2%', '−12%' for a hidden fraction below zero), or '–' when not defined."""
    if fraction is None:
        return "–"
    return f"{100.0 * fraction:.0f}%" if abs(fraction) >= 0.1 else f"{100.0 * fraction:.1f}%"


def state_per_rank(point: dict[str, Any]) -> str:
    """The largest optimizer state of any rank and its ratio to P = 1: '1.5 MiB (0.50×)'."""
    ratio = point.get("optimizer_state_ratio")
    return size(point["optimizer_state_max_bytes"]) + (f" ({ratio:.2f}×)" if ratio is not None else "")


# --------------------------------------------------------------------------------------------------------
# The printed table
# --------------------------------------------------------------------------------------------------------


def text_table(study: dict[str, Any]) -> str:
    """The measured rows as a fixed-width text table (one line per P), for the terminal.

    Ends with the fit, the projection's largest error on the measured P and, above the model's error limit,
    a line starting "warning:".
    """
    header = ("P", "G", "step", "samples/s", "speedup", "effic.", "imbal.", "compute", "exchange", "hidden",
              "update", "opt. state/rank", "model err.", "peak RSS", "placement")
    lines = []
    for point in study["points"]:
        compute = point["phase_max_s"]["forward"] + point["phase_max_s"]["backward"]
        lines.append((str(point["p"]), str(point["global_batch"]), seconds(point["step_s"]),
                      f"{point['samples_per_s']:,.0f}", f"{point['speedup']:.2f}", f"{point['efficiency']:.2f}",
                      f"{point['load_imbalance']:.3f}", seconds(compute), seconds(point["phase_max_s"]["exchange"]),
                      share(point["hidden_fraction"]), point["update"], state_per_rank(point),
                      share(point["projection_error"]), size(point["peak_rss_max_bytes"]), point["placement"]))
    widths = [max(len(row[i]) for row in [header, *lines]) for i in range(len(header))]
    text = ["  ".join(cell.rjust(width) if i < len(header) - 1 else cell
                      for i, (cell, width) in enumerate(zip(row, widths, strict=True))) for row in [header, *lines]]
    title = (f"{study['mode']} scaling, {study['steps']} timed steps, {study['job']['update']} update; compute and "
             f"exchange: slowest rank per step; hidden: share of the exchange hidden behind compute; model err.: "
             f"|projected − measured| / measured step")
    model = study["model"]
    if model.get("available"):
        tail = [f"allreduce fit at P={model['fit']['p']}: alpha {seconds(model['fit']['alpha_s'])}, "
                f"bandwidth {_bandwidth(model['fit']['bandwidth_bytes_per_s'])}; largest step-time error of the "
                f"projection on measured P: {100 * model['max_abs_step_error']:.1f}%"]
        tail += [model["warning"]] if model.get("warning") else []
    else:
        tail = [f"no communication model: {model['reason']}"]
    verdict = gain_verdict(study)
    return "\n".join([title, *text, *tail, *([verdict] if verdict else [])])


LITTLE_GAIN_EFFICIENCY = 0.75
"""Below this strong-scaling efficiency at every measured P > 1, :func:`gain_verdict` says the model gains little."""


def gain_verdict(study: dict[str, Any]) -> str | None:
    """A sentence, in words, when a strong-scaling study shows the model gains little or nothing from more processes
    (every measured P > 1 below :data:`LITTLE_GAIN_EFFICIENCY`), with the measured reason and what to do instead;
    None otherwise (or for a weak-scaling study, or with no P > 1)."""
    if study.get("mode") != "strong":
        return None
    more = [point for point in study["points"] if point["p"] > 1]
    if not more or any(point["efficiency"] >= LITTLE_GAIN_EFFICIENCY for point in more):
        return None
    best = max(more, key=lambda point: point["speedup"])
    serial = next((point for point in study["points"] if point["p"] == 1), None)
    amount = "nothing" if best["speedup"] < 1.05 else "little"
    compute = best["phase_max_s"]["forward"] + best["phase_max_s"]["backward"]
    rest = best["step_s"] - compute
    why = (f"at P = {best['p']} each rank computes for {seconds(compute)} of a {seconds(best['step_s'])} step, and "
           f"the exchange and fixed costs take the other {seconds(max(rest, 0.0))}")
    if serial is not None:
        why += f" (one process: {seconds(serial['step_s'])} a step)"
    return (f"verdict: this model gains {amount} from more processes (best speedup {best['speedup']:.2f}, efficiency "
            f"{best['efficiency']:.2f}): {why}; run it on fewer processes, with a larger `run.global_batch`, or "
            f"spend the processes on several variants of the job at once")


def _bandwidth(bytes_per_s: float | None) -> str:
    if bytes_per_s is None:
        return "unbounded"
    if bytes_per_s >= 1e9:
        return f"{bytes_per_s / 1e9:.3g} GB/s"
    return f"{bytes_per_s / 1e6:.3g} MB/s"


# --------------------------------------------------------------------------------------------------------
# Figures
# --------------------------------------------------------------------------------------------------------


def _figure(width: float, height: float):
    from matplotlib.figure import Figure

    figure = Figure(figsize=(width, height), layout="constrained")
    return figure


def _axes_style(ax) -> None:
    ax.grid(True, which="major", color="#dddddd", linewidth=0.7)
    ax.set_axisbelow(True)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)


def _log2_axis(ax, ps: list[int]) -> None:
    ax.set_xscale("log", base=2)
    ax.set_xticks(ps)
    ax.set_xticklabels([str(p) for p in ps])
    ax.minorticks_off()


def plot_scaling(study: dict[str, Any], path: Path) -> Path:
    """Two panels: speedup and efficiency against P, measured, ideal and (if fitted) projected."""
    points = study["points"]
    model = study["model"]
    ps = [point["p"] for point in points]
    every_p = sorted(set(ps) | {row["p"] for net in model.get("networks", []) for row in net["rows"]})
    figure = _figure(9.0, 3.6)
    left, right = figure.subplots(1, 2)
    left.plot(every_p, every_p, color="#999999", linestyle="--", linewidth=1, label="ideal")
    right.axhline(1.0, color="#999999", linestyle="--", linewidth=1, label="ideal")
    styles = [("#3a6ea5", "-"), ("#c8553d", "-.")]
    for (colour, line), net in zip(styles, model.get("networks", []), strict=False):
        rows = net["rows"]
        label = f"model, {net['name']}"
        left.plot([r["p"] for r in rows], [r["speedup"] for r in rows], color=colour, linestyle=line,
                  linewidth=1, marker=".", label=label)
        right.plot([r["p"] for r in rows], [r["efficiency"] for r in rows], color=colour, linestyle=line,
                   linewidth=1, marker=".", label=label)
    left.plot(ps, [point["speedup"] for point in points], color="black", marker="o", linewidth=1.6,
              label="measured")
    right.plot(ps, [point["efficiency"] for point in points], color="black", marker="o", linewidth=1.6,
               label="measured")
    scaled = " (scaled, P·T1/TP)" if study["mode"] == "weak" else " (T1/TP)"
    left.set_yscale("log", base=2)
    left.set_ylabel("speedup" + scaled)
    right.set_ylabel("parallel efficiency")
    right.set_ylim(bottom=0.0, top=max(1.1, max(point["efficiency"] for point in points) * 1.05))
    for ax in (left, right):
        _axes_style(ax)
        _log2_axis(ax, every_p)
        ax.set_xlabel("processes P")
    right.legend(fontsize=7, frameon=False, loc="lower left")
    figure.suptitle(f"{study['mode']} scaling of {Path(study['job']['path']).name}", fontsize=10)
    figure.savefig(path, dpi=110)
    return path


def plot_breakdown(study: dict[str, Any], path: Path) -> Path:
    """Stacked bars: mean seconds per step in each phase at each measured P, with the step time marked."""
    points = study["points"]
    figure = _figure(5.6, 3.6)
    ax = figure.subplots()
    labels = [f"P={point['p']}" for point in points]
    positions = list(range(len(points)))
    bottom = [0.0] * len(points)
    for phase in PHASES:
        heights = [1e3 * point["phase_mean_s"][phase] for point in points]
        ax.bar(positions, heights, bottom=bottom, width=0.6, color=PHASE_COLOURS[phase], label=phase)
        bottom = [b + h for b, h in zip(bottom, heights, strict=True)]
    ax.scatter(positions, [1e3 * point["step_s"] for point in points], marker="_", s=600, color="black",
               label="step (slowest rank)", zorder=3)
    ax.set_xticks(positions)
    ax.set_xticklabels(labels)
    ax.set_ylabel("milliseconds per step")
    top = max(max(bottom), 1e3 * max(point["step_s"] for point in points))
    ax.set_ylim(0.0, 1.45 * top)  # headroom for the legend above the bars
    _axes_style(ax)
    ax.legend(fontsize=7, frameon=False, ncols=2)
    figure.suptitle(f"where a step's time goes ({study['mode']} scaling)", fontsize=10)
    figure.savefig(path, dpi=110)
    return path


def plot_allreduce(study: dict[str, Any], path: Path) -> Path:
    """Measured allreduce medians against message size at each P > 1, with the fitted model at the fit's P."""
    model = study["model"]
    figure = _figure(5.6, 3.6)
    ax = figure.subplots()
    shades = ["#7fa7d1", "#3a6ea5", "#1d3f66", "#0b1f33"]
    for i, (p, timings) in enumerate(sorted(study["allreduce"].items(), key=lambda item: int(item[0]))):
        ax.plot([m["n_bytes"] for m in timings], [m["median_s"] for m in timings], linestyle="none",
                marker="o", color=shades[i % len(shades)], label=f"measured, P={p}")
    if model.get("available"):
        fit = model["fit"]
        sizes = [point["n_bytes"] for point in fit["points"]]
        grid = [sizes[0] * (sizes[-1] / sizes[0]) ** (k / 60) for k in range(61)]
        curve = [costmodel.allreduce_time(fit["algorithm"], fit["p"], n, fit["alpha_s"], fit["beta_s_per_byte"],
                                          fit["gamma_s_per_byte"]) for n in grid]
        ax.plot(grid, curve, color="black", linewidth=1, label=f"fit, {fit['algorithm']} at P={fit['p']}")
        for net in model["networks"][1:]:
            given = [costmodel.best_allreduce(fit["p"], n, net["alpha_s"], net["beta_s_per_byte"],
                                              fit["gamma_s_per_byte"])[1] for n in grid]
            ax.plot(grid, given, color="#c8553d", linestyle="-.", linewidth=1, label=f"model, {net['name']}")
    ax.set_xscale("log", base=2)
    ax.set_yscale("log")
    ax.set_xlabel("message size, bytes")
    ax.set_ylabel("seconds (median)")
    _axes_style(ax)
    ax.legend(fontsize=7, frameon=False)
    figure.suptitle("in-place SUM allreduce", fontsize=10)
    figure.savefig(path, dpi=110)
    return path


# --------------------------------------------------------------------------------------------------------
# report.md
# --------------------------------------------------------------------------------------------------------


def render(study: dict[str, Any], out: Path) -> list[Path]:
    """Draw the figures (when matplotlib is importable) and write out/report.md; returns the paths written.

    A missing matplotlib adds a note to study["notes"] and to the report instead of figures.
    """
    written: list[Path] = []
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        study["notes"].append(NO_PLOTS)
    else:
        written.append(plot_scaling(study, out / "scaling.png"))
        written.append(plot_breakdown(study, out / "breakdown.png"))
        if study["allreduce"]:
            written.append(plot_allreduce(study, out / "allreduce.png"))
    figures = {path.name for path in written}
    report = out / "report.md"
    report.write_text(markdown(study, figures))
    return [*written, report]


def _table(header: list[str], rows: list[list[str]], text_columns: tuple[int, ...] = (0,)) -> list[str]:
    """A Markdown table; numbers right-aligned, the columns in `text_columns` left-aligned."""
    rule = "|" + "|".join(":---" if i in text_columns else "---:" for i in range(len(header))) + "|"
    lines = ["| " + " | ".join(header) + " |", rule]
    return lines + ["| " + " | ".join(row) + " |" for row in rows]


def _figure_line(name: str, figures: set[str]) -> list[str]:
    return [f"![{FIGURES[name]}]({name})", ""] if name in figures else []


def markdown(study: dict[str, Any], figures: set[str]) -> str:
    """report.md: machine, job, measured table, figures, fit, projection and assumptions on one page."""
    machine, job, model = study["machine"], study["job"], study["model"]
    ps = [point["p"] for point in study["points"]]
    lines = [
        f"# Scaling study: {Path(job['path']).name}, {study['mode']} scaling",
        "",
        f"P = {', '.join(map(str, ps))}; {study['steps']} timed steps after kernel warm-up and "
        f"{study['warmup_steps']} untimed steps; {study['threads']} BLAS thread(s) per rank; ranks "
        f"{'pinned to cores' if study['pin'] else 'not pinned'}. Created {study['created']}.",
        "",
        "## Machine",
        "",
        *_table(["", ""], [
            ["node / CPU", f"{machine['node']} / {machine['cpu']}"],
            ["cores", f"{machine['cores']} logical, {machine.get('physical_cores') or '?'} physical"],
            ["BLAS", "; ".join(machine["blas"]) or "not found by threadpoolctl"],
            ["MPI library", f"{machine['mpi_library']} (mpi4py {machine['mpi4py']})"],
            ["MPI thread level", ", ".join(f"P={pt['p']}: {pt['mpi_thread_level']}" for pt in study["points"])],
            ["Python / numpy", f"{machine['python']} / {machine['numpy']}"],
        ], text_columns=(0, 1)),
        "",
        "## Job",
        "",
        f"Layers {'-'.join(map(str, job['layers']))} (hidden {', '.join(job['activation']) or 'none'}, loss "
        f"{job['loss']}), {job['dtype']}, {job['params']:,} parameters ({size(job['grad_bytes'])} of gradient). "
        f"Global batch G = {job['global_batch']} {job['global_batch_meaning']}; reduction {job['reduction']}"
        + (f" ({job['exact_format']} format)" if job["reduction"] == "exact" else "")
        + f", {job['update']} update, messages of {job['message_mib']:g} MiB, optimizer {job['optimizer']}.",
        "",
        "## Measured",
        "",
        "Step: slowest rank's wall clock per step. Phases: mean over ranks (max in brackets), per step. "
        "Imbalance: max / mean of per-rank forward + backward. "
        + ("Efficiency T1/(P·TP)." if study["mode"] == "strong" else
           "Efficiency T1/TP (per-rank throughput against P = 1); speedup scaled, P·T1/TP.")
        + " Exchange alone: the step's gradient exchange run without compute (slowest rank, median), with the "
        "parameter allgather of a sharded update after the +; hidden: 1 − exchange phase (mean) / exchange alone. "
        "Optimizer state: the largest rank's, and its ratio to P = 1.",
        "",
    ]
    rows = []
    for point in study["points"]:
        rows.append([str(point["p"]), str(point["global_batch"]), seconds(point["step_s"]),
                     f"{point['samples_per_s']:,.0f}", f"{point['speedup']:.2f}", f"{point['efficiency']:.2f}",
                     f"{point['load_imbalance']:.3f}",
                     *(f"{seconds(point['phase_mean_s'][ph])} ({seconds(point['phase_max_s'][ph])})"
                       for ph in PHASES),
                     size(point["peak_rss_max_bytes"]), point["placement"],
                     f"{seconds(point['exchange_alone_s'])} + {seconds(point['publish_alone_s'])}",
                     share(point["hidden_fraction"]), state_per_rank(point)])
    lines += _table(["P", "G", "step", "samples/s", "speedup", "efficiency", "imbalance", *PHASES, "peak RSS",
                     "placement (rank:cpu)", "exchange alone", "hidden", "optimizer state"], rows, text_columns=(13,))
    lines.append("")
    lines += _figure_line("scaling.png", figures) + _figure_line("breakdown.png", figures)
    lines += ["## Communication model", ""]
    if not model.get("available"):
        lines += [f"Not fitted: {model['reason']}.", ""]
    else:
        lines += _model_section(study, figures)
    lines += ["### Assumptions", ""]
    lines += [f"{i}. {text}" for i, text in enumerate(model["assumptions"], start=1)]
    if study["notes"]:
        lines += ["", "Notes: " + "; ".join(study["notes"]) + "."]
    return "\n".join(lines) + "\n"


def _model_section(study: dict[str, Any], figures: set[str]) -> list[str]:
    model = study["model"]
    fit = model["fit"]
    others = ", ".join(f"{c['algorithm']} {100 * c['cheapest_rms_relative_error']:.1f}%"
                       for c in model["candidates"])
    lines = [
        f"Thakur–Rabenseifner–Gropp α–β–γ model fitted to the allreduce medians at P = {fit['p']} with the "
        f"coefficients of **{fit['algorithm']}**, the fit whose cheapest-algorithm times match the "
        f"measurements best (RMS relative error {others}): "
        f"α = {seconds(fit['alpha_s'])}, β = {fit['beta_s_per_byte']:.3g} s/B "
        f"({_bandwidth(fit['bandwidth_bytes_per_s'])}), γ = {fit['gamma_s_per_byte']:.3g} s/B held fixed "
        f"(numpy add of {size(model['gamma_bytes'])}), R² = {fit['r_squared']:.4f}.",
        "",
        *_table(["message", "measured", "model", "error"],
                [[size(pt["n_bytes"]), seconds(pt["measured_s"]), seconds(pt["model_s"]),
                  percent(pt["relative_error"])] for pt in fit["points"]]),
        "",
        *_figure_line("allreduce.png", figures),
        "### Projection",
        "",
        f"Compute per step {seconds(model['compute_s'])} (P = 1: data + forward + backward + update), "
        + _compute_rule(model)
        + f"; the exchange is {_collectives(model)}, cheapest algorithm per P, fully exposed. "
        f"Error = (model − measured) / measured step time; largest on measured P: "
        f"{100 * model['max_abs_step_error']:.1f}%.",
        "",
        *([f"**{model['warning']}**", ""] if model.get("warning") else []),
    ]
    measured_net = model["networks"][0]
    given = model["networks"][1] if len(model["networks"]) > 1 else None
    given_rows = {row["p"]: row for row in given["rows"]} if given else {}
    header = ["P", "compute", "exchange", "step", "efficiency", "measured step", "measured eff.", "error"]
    if given:
        header += [f"step, {given['spec']}", f"efficiency, {given['spec']}"]
    rows = []
    for row in measured_net["rows"]:
        allreduce = "none" if row["algorithm"] == costmodel.NO_COMMUNICATION else \
            f"{seconds(row['comm_s'])} {row['algorithm']}"
        cells = [str(row["p"]), seconds(row["compute_s"]), allreduce,
                 seconds(row["step_s"]), f"{row['efficiency']:.3f}", seconds(row.get("measured_step_s")),
                 f"{row['measured_efficiency']:.3f}" if "measured_efficiency" in row else "–",
                 percent(row.get("step_error"))]
        if given:
            other = given_rows[row["p"]]
            cells += [seconds(other["step_s"]), f"{other['efficiency']:.3f}"]
        rows.append(cells)
    return lines + _table(header, rows) + [""]


def _compute_rule(model: dict[str, Any]) -> str:
    """What of the compute divides by P, in words (see `costmodel.project_step`)."""
    update = seconds(model.get("update_s", model.get("replicated_s", 0.0)))
    if model.get("update", "replicated") == "sharded":
        return (f"divided by P, the {update} update included (sharded)" if model["mode"] == "strong" else
                f"the same at every P except the {update} update, divided by P (sharded)")
    return (f"divided by P except the {update} update every rank repeats" if model["mode"] == "strong" else
            "the same at every P")


def _collectives(model: dict[str, Any]) -> str:
    """The step's collectives in words: 'one allreduce of 7.4 MiB', 'a reduce-scatter of 7.4 MiB (3 calls) and …'."""
    words = {"allreduce": "allreduce", "reduce_scatter": "reduce-scatter", "allgather": "allgather"}
    parts = [f"{words[c['kind']]} of {size(c['n_bytes'])}" + (f" ({c['calls']} calls)" if c["calls"] > 1 else "")
             for c in model["collectives"]]
    return "one " + parts[0] if len(parts) == 1 else ", then ".join(parts)
