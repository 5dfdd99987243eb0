"""Training curves from metrics.jsonl: `shardmill curves SOURCE [--out-dir DIR]` and `train --curves`.

    read_metrics   metrics.jsonl → the records to draw: epochs (one per epoch, the latest wins), health records
                   (one per step), run starts, the early stop; notes on what was skipped
    figures        the records → what each PNG draws (plain JSON values; also written as curves.json)
    draw_curves    figures → PNGs (matplotlib's Agg canvas, no display) and curves.json beside them

A resumed run appends to the same metrics.jsonl, so an epoch can appear twice: the later record replaces the
earlier. A run-start record (``"kind": "start"``) of a resume from step s also retires what the file holds past s
from the earlier run: that stretch of training was abandoned, and the resumed run retrains it.
"""

from __future__ import annotations

import json
import math
import sys
from pathlib import Path
from typing import Any

from shardmill.errors import JobError
from shardmill.timing import PHASES

METRICS_FILE = "metrics.jsonl"
LARGEST_COUNT = 2**53
"""An epoch or step beyond ±2⁵³ (float64's exact integers) is no count a run writes: its record is skipped."""
WIDE_SPAN = 100.0
"""Losses and RMSE are drawn on a log axis when every drawn value is positive and the largest is more than this
many times the smallest (a span of more than two decades): a linear axis then flattens the later epochs to 0."""
CURVES_FILE = "curves.json"
FORMAT = "shardmill-curves-1"

QUALITY = ("accuracy", "rmse")
"""The second metric of an epoch record: accuracy (classification) or RMSE (regression)."""

FIGURE_NAMES = ("loss.png", "accuracy.png", "rmse.png", "throughput.png", "phases.png", "learning_rate.png",
                "health.png")
"""Every PNG draw_curves may write; one left from an earlier drawing that this one does not draw is removed."""

HEALTH_PANELS = {
    "grad_norm": "gradient norm ‖g‖",
    "update_ratio": "update / weight ‖Δθ‖/‖θ‖",
    "saturated_fraction": "saturated units (|z| > 4)",
    "dead_fraction": "dead units (zero on every row)",
}
"""Per-layer fields of a health record (shardmill.training.health.diagnose) → the axis label of their panel."""

DPI = 100
WIDTH_IN, PANEL_HEIGHT_IN, HEALTH_PANEL_HEIGHT_IN = 6.4, 3.2, 2.4
"""Inches: a figure is 640 px wide at DPI; one panel 320 px high, each of several panels 240 px."""

# The look: ink-coloured lines on white, one horizontal grid, no box; train solid, validation dashed.
INK = "#22313f"
SECOND = "#b4562b"
SERIES_COLOURS = (INK, SECOND, "#4d7c59", "#7a5c8e", "#a88a2f", "#3f7f93", "#8a4b4b")
GRID = "#e4e4e4"
FRAME = "#9a9a9a"
MARK = "#111111"


# --------------------------------------------------------------------------------------------------------
# Reading
# --------------------------------------------------------------------------------------------------------


def metrics_path(source: Path) -> Path:
    """The metrics.jsonl of ``source`` (a workdir of `shardmill train`, or the file itself); JobError when missing."""
    source = Path(source)
    if source.is_dir():
        path = source / METRICS_FILE
        if not path.is_file():
            raise JobError(f"`RUN` {str(source)!r} holds no {METRICS_FILE}; give the workdir of a "
                           f"`shardmill train` run (its `run.workdir`) or the path of its {METRICS_FILE}")
        return path
    if not source.is_file():
        raise JobError(f"`RUN` {str(source)!r} does not exist; give a workdir of `shardmill train` or its "
                       f"{METRICS_FILE}")
    return source


def read_metrics(path: Path) -> dict[str, Any]:
    """Parse a metrics.jsonl (``path``: the file, or the workdir holding it) into the records curves draw.

    Returns {"path": str, "lines": int, "epochs": [epoch records sorted by epoch, one per epoch],
    "health": [health records sorted by step, one per step], "starts": [run-start records in file order],
    "early_stop": the early-stop record of the run as it stands, or None, "kinds": {kind: records read},
    "notes": [one sentence per thing skipped or retired]}.

    Tolerant: records of unknown kinds and unknown fields are kept out of the way, not refused; a last line
    that does not parse (a run ended while writing it) and any other line that is not a JSON object are skipped
    with a note. A later epoch record replaces an earlier one of the same epoch (a resumed run retrains it), a
    later health record one of the same step; a start record with ``resumed_from_step`` = s retires the
    earlier epoch, health and early-stop records past step s (a resume from the step where a run stopped early
    keeps its early stop; an epoch past it, after a resume with more patience, drops it). Raises JobError for a
    missing file or one without a single epoch record.
    """
    path = metrics_path(path)
    try:
        text = path.read_text(encoding="utf-8", errors="replace")
    except OSError as err:
        raise JobError(f"`RUN` {str(path)!r} cannot be read: {err.strerror or err}") from None
    lines = text.split("\n")
    if lines and lines[-1] == "":
        lines.pop()  # the newline that ends the last complete record
    last = len(lines)
    epochs: dict[int, dict[str, Any]] = {}
    health: dict[int, dict[str, Any]] = {}
    starts: list[dict[str, Any]] = []
    early_stop: dict[str, Any] | None = None
    kinds: dict[str, int] = {}
    notes: list[str] = []
    for number, line in enumerate(lines, start=1):
        if not line.strip():
            continue
        record = _parse(line)
        if record is None:
            appended = _after_torn(line)
            if appended is not None:  # a resumed run appended its first record to a torn last line
                notes.append(f"line {number}: an incomplete record (a run ended while writing it) was skipped; "
                             f"the record written after it on the same line was read")
                record = appended
            elif number == last:
                notes.append(f"line {number} (the last) is incomplete and was skipped: the run ended while "
                             f"writing it")
                continue
            else:
                notes.append(f"line {number} is not a JSON object and was skipped")
                continue
        kind = record.get("kind")
        kind = kind if isinstance(kind, str) else "?"
        beyond = _out_of_range(record, {"epoch": "epoch", "health": "step"}.get(kind, "step"))
        if beyond is not None:
            notes.append(f"line {number} ({kind} record) was skipped: {beyond}")
            continue
        kinds[kind] = kinds.get(kind, 0) + 1
        if kind == "epoch" and _is_int(record.get("epoch")):
            epochs[record["epoch"]] = record
            if early_stop is not None and _after(record, early_stop.get("step")):
                early_stop = None  # resumed with more patience: the run went on past it
        elif kind == "health" and _is_int(record.get("step")) and isinstance(record.get("layers"), list):
            health[record["step"]] = record
        elif kind == "early_stop":
            early_stop = record
        elif kind == "start":
            starts.append(record)
            resumed = record.get("resumed_from_step")
            if _is_int(resumed):
                if early_stop is not None and _after(early_stop, resumed):
                    early_stop = None
                retired = [e for e, r in epochs.items() if _after(r, resumed)]
                for epoch in retired:
                    del epochs[epoch]
                for step in [s for s in health if s > resumed]:
                    del health[step]
                if retired:
                    notes.append(f"line {number}: the run resumed from step {resumed}, so the earlier records of "
                                 f"epoch(s) {', '.join(map(str, sorted(retired)))} past that step are not drawn")
    if not epochs:
        raise JobError(f"`RUN` {str(path)!r} holds no epoch records ({len(lines)} line(s) read); curves need "
                       f"at least one finished epoch")
    return {"path": str(path), "lines": len(lines), "epochs": [epochs[e] for e in sorted(epochs)],
            "health": [health[s] for s in sorted(health)], "starts": starts, "early_stop": early_stop,
            "kinds": kinds, "notes": notes}


def _parse(line: str) -> dict[str, Any] | None:
    try:
        record = json.loads(line)
    except (ValueError, RecursionError):  # RecursionError: brackets nested deeper than the parser goes
        return None
    return record if isinstance(record, dict) else None


def _after_torn(line: str) -> dict[str, Any] | None:
    """The complete record that follows a torn one on the same line, or None.

    A run stopped mid-write leaves a line without its end; the resumed run appends its first record right after
    it. The first '{"' from the left whose rest of the line parses whole is that record: an object opened in the
    torn part never closes within the line, and one that closes there leaves the rest unparsed.
    """
    start = line.find('{"', 1)
    while start > 0:
        record = _parse(line[start:])
        if record is not None:
            return record
        start = line.find('{"', start + 1)
    return None


def _after(record: dict[str, Any], step: Any) -> bool:
    """Whether ``record`` ends past ``step`` (False where either step is missing)."""
    return _is_int(step) and _is_int(record.get("step")) and record["step"] > step


def _is_int(value: Any) -> bool:
    """An integer count (epoch, step, processes) that a float64 axis holds exactly: |value| ≤ 2⁵³."""
    return isinstance(value, int) and not isinstance(value, bool) and abs(value) <= LARGEST_COUNT


def _out_of_range(record: dict[str, Any], key: str) -> str | None:
    """A note's words when ``record[key]`` is an integer too large for an axis, else None."""
    value = record.get(key)
    if not isinstance(value, int) or isinstance(value, bool) or abs(value) <= LARGEST_COUNT:
        return None
    digits = str(abs(value))
    shown = digits if len(digits) <= 20 else f"{digits[:12]}… ({len(digits)} digits)"
    return f"its {key} {'-' if value < 0 else ''}{shown} is beyond ±2**53"


def _number(value: Any) -> float | None:
    """A finite float, or None (missing, not a number, NaN or ±inf): what a curve leaves as a gap."""
    if isinstance(value, bool) or not isinstance(value, int | float):
        return None
    try:
        value = float(value)
    except OverflowError:  # an integer beyond the largest float64
        return None
    return value if math.isfinite(value) else None


def _field(record: dict[str, Any], *keys: str) -> Any:
    """record[k1][k2]… or None where a level is missing or not a dict."""
    for key in keys:
        if not isinstance(record, dict):
            return None
        record = record.get(key)
    return record


# --------------------------------------------------------------------------------------------------------
# What each figure draws
# --------------------------------------------------------------------------------------------------------


def _series(records: list[dict[str, Any]], x_key: str, *keys: str) -> dict[str, list]:
    """{"x": [...], "y": [...]} over the records that hold the field (y None where it is not a finite number)."""
    present = [r for r in records if _field(r, *keys) is not None]
    return {"x": [r[x_key] for r in present], "y": [_number(_field(r, *keys)) for r in present]}


def _panel(y_label: str, series: dict[str, dict[str, list]], x_label: str = "epoch",
           markers: list[dict[str, Any]] | None = None, log: bool = False, fraction: bool = False) -> dict[str, Any]:
    return {"x_label": x_label, "y_label": y_label, "log": log, "fraction": fraction,
            "series": {name: s for name, s in series.items() if s["x"]}, "markers": markers or []}


def _best(metrics: dict[str, Any]) -> dict[str, Any] | None:
    """The ``best`` field of the last epoch record that has one (the run's best epoch as it ended)."""
    for record in reversed(metrics["epochs"]):
        best = record.get("best")
        if isinstance(best, dict) and _is_int(best.get("epoch")) and isinstance(best.get("metric"), str):
            return best
    return None


def _markers(metrics: dict[str, Any], panel_metric: str) -> list[dict[str, Any]]:
    """Markers of a loss or accuracy/RMSE panel: the best epoch (when it watches this metric), the early stop."""
    markers = []
    best = _best(metrics)
    if best is not None and best["metric"] == f"validation.{panel_metric}":
        markers.append({"kind": "best", "metric": best["metric"], "x": best["epoch"], "y": _number(best.get("value"))})
    stop = metrics["early_stop"]
    if stop is not None and _is_int(stop.get("epoch")):
        metric, patience = stop.get("metric"), stop.get("patience")
        markers.append({"kind": "early_stop", "x": stop["epoch"], "metric": metric if isinstance(metric, str) else None,
                        "patience": patience if _is_int(patience) else None})
    return markers


def figures(metrics: dict[str, Any]) -> dict[str, dict[str, Any]]:
    """What each PNG draws, from :func:`read_metrics`'s dict: {file name: {"title", "panels": {name: panel}}}.

    A panel is {"x_label", "y_label", "log" (log y axis), "fraction" (y from 0: a share of units), "series":
    {label: {"x": [...], "y": [...]}}, "markers": [...]}: x in epochs (health: steps), y in the record's own
    units (None: a gap). Figures without data (no accuracy in a regression, no health records) are left out.
    """
    epochs = metrics["epochs"]
    out: dict[str, dict[str, Any]] = {}
    loss = {"train": _series(epochs, "epoch", "train", "loss"),
            "validation": _series(epochs, "epoch", "validation", "loss")}
    out["loss.png"] = {"title": "loss per epoch", "panels": {"loss": _panel(
        "loss (mean per row)", loss, markers=_markers(metrics, "loss"), log=_wide(loss))}}
    for quality in QUALITY:
        series = {"train": _series(epochs, "epoch", "train", quality),
                  "validation": _series(epochs, "epoch", "validation", quality)}
        if any(s["x"] for s in series.values()):
            label = "accuracy (fraction correct)" if quality == "accuracy" else "RMSE (target units)"
            log = quality == "rmse" and _wide(series)  # an error, like the loss; accuracy is a share in [0, 1]
            out[f"{quality}.png"] = {"title": f"{'accuracy' if quality == 'accuracy' else 'RMSE'} per epoch",
                                     "panels": {quality: _panel(label, series, markers=_markers(metrics, quality),
                                                                log=log)}}
    processes = sorted({r.get("processes") for r in epochs if _is_int(r.get("processes"))})
    throughput = {f"P = {p}": _series([r for r in epochs if r.get("processes") == p], "epoch", "samples_per_s")
                  for p in processes} or {"samples/s": _series(epochs, "epoch", "samples_per_s")}
    out["throughput.png"] = {"title": "training throughput per epoch (slowest rank's clock)",
                             "panels": {"samples_per_s": _panel("samples per second", throughput)}}
    recorded = {k for r in epochs if isinstance(r.get("phase_seconds_max"), dict) for k in r["phase_seconds_max"]}
    names = list(PHASES) + sorted(recorded - set(PHASES))  # the step's order, then any phase added later
    phases = {name: _series(epochs, "epoch", "phase_seconds_max", name) for name in names}
    phases["epoch wall clock"] = _series(epochs, "epoch", "seconds")
    out["phases.png"] = {"title": "seconds per epoch in each phase of the step (slowest rank per phase)",
                         "panels": {"phase_seconds_max": _panel("seconds", phases, log=_positive(phases))}}
    out["learning_rate.png"] = {"title": "learning rate of the last update of each epoch", "panels": {
        "learning_rate": _panel("learning rate", {"learning rate": _series(epochs, "epoch", "learning_rate")})}}
    if metrics["health"]:
        out["health.png"] = {"title": "training health per layer", "panels": _health_panels(metrics["health"])}
    for figure in out.values():
        figure["panels"] = {name: panel for name, panel in figure["panels"].items() if panel["series"]}
    return {name: figure for name, figure in out.items() if figure["panels"]}


def _health_panels(records: list[dict[str, Any]]) -> dict[str, dict[str, Any]]:
    """One panel per per-layer field of the health records, one series per layer, x in steps."""
    rows = [(r["step"], layer) for r in records for layer in r["layers"]
            if isinstance(layer, dict) and _is_int(layer.get("layer"))]
    panels = {}
    for key, label in HEALTH_PANELS.items():
        layers = sorted({layer["layer"] for _, layer in rows if key in layer})
        series = {}
        for index in layers:
            points = [(step, _number(layer[key])) for step, layer in rows if layer["layer"] == index and key in layer]
            series[f"layer {index}"] = {"x": [s for s, _ in points], "y": [v for _, v in points]}
        log = key in ("grad_norm", "update_ratio") and _positive(series)
        panels[key] = _panel(label, series, x_label="step", log=log, fraction=key.endswith("_fraction"))
    return panels


def _wide(series: dict[str, dict[str, list]]) -> bool:
    """True when every drawn value is > 0 and they span more than two decades (max > :data:`WIDE_SPAN` × min)."""
    values = [v for s in series.values() for v in s["y"] if v is not None]
    return bool(values) and min(values) > 0 and max(values) > WIDE_SPAN * min(values)


def _positive(series: dict[str, dict[str, list]]) -> bool:
    """True when every drawn value is > 0 (a log axis then loses nothing) and there is at least one."""
    values = [v for s in series.values() for v in s["y"] if v is not None]
    return bool(values) and min(values) > 0


# --------------------------------------------------------------------------------------------------------
# Drawing
# --------------------------------------------------------------------------------------------------------


def draw_curves(source: Path, out_dir: Path) -> list[Path]:
    """Draw the curves of ``source`` (a workdir of `shardmill train` or its metrics.jsonl) into ``out_dir``.

    Writes one PNG per figure of :func:`figures` (loss, accuracy or RMSE, throughput, phases, learning rate,
    health when there are health records; 640 px wide at 100 dpi) and curves.json (the data each figure draws,
    the source and the notes). A figure file of an earlier drawing that this one does not draw is removed.
    Returns the paths written, curves.json last. JobError for a missing or empty source or an unwritable folder.
    """
    return write_curves(read_metrics(Path(source)), Path(out_dir))


def write_curves(metrics: dict[str, Any], out_dir: Path) -> list[Path]:
    """The PNGs and curves.json of :func:`read_metrics`'s dict in ``out_dir`` (see :func:`draw_curves`)."""
    drawn = figures(metrics)
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise JobError(f"`--out-dir` {str(out_dir)!r} cannot be created: {err.strerror or err}") from None
    written = []
    try:
        for name in FIGURE_NAMES:
            path = out_dir / name
            if name in drawn:
                _render(drawn[name], path)
                written.append(path)
            elif path.is_file():
                path.unlink()
        summary = {"format": FORMAT, "source": metrics["path"], "notes": metrics["notes"], "figures": drawn}
        json_path = out_dir / CURVES_FILE
        json_path.write_text(json.dumps(summary, indent=1, allow_nan=False) + "\n")
    except OSError as err:
        raise JobError(f"`--out-dir` {str(out_dir)!r} cannot be written: {err.strerror or err}") from None
    return [*written, json_path]


def _render(figure_data: dict[str, Any], path: Path) -> None:
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    panels = figure_data["panels"]
    height = PANEL_HEIGHT_IN if len(panels) == 1 else HEALTH_PANEL_HEIGHT_IN * len(panels)
    figure = Figure(figsize=(WIDTH_IN, height), layout="constrained")
    FigureCanvasAgg(figure)  # draw on Agg: no display needed
    axes = figure.subplots(len(panels), 1, sharex=True, squeeze=False)[:, 0]
    for ax, panel in zip(axes, panels.values(), strict=True):
        _draw_panel(ax, panel)
    axes[-1].set_xlabel(next(iter(panels.values()))["x_label"], fontsize=8, color=INK)
    axes[0].set_title(figure_data["title"], loc="left", fontsize=9, color=INK)
    figure.savefig(path, dpi=DPI, facecolor="white")


def _draw_panel(ax, panel: dict[str, Any]) -> None:
    from matplotlib.ticker import FuncFormatter, MaxNLocator

    for i, (name, series) in enumerate(panel["series"].items()):
        y = [math.nan if v is None else v for v in series["y"]]
        if name == "validation":
            ax.plot(series["x"], y, color=SECOND, linestyle=(0, (4, 2)), linewidth=1.3, marker="o", markersize=3.5,
                    markerfacecolor="white", label=name)
        elif name == "epoch wall clock":
            ax.plot(series["x"], y, color=FRAME, linestyle=":", linewidth=1.2, label=name)
        else:
            # a layer keeps its colour in every panel (a panel of relu layers only still shows layer 1 as layer 1)
            k = int(name.split()[1]) if name.startswith("layer ") and name.split()[1].isdigit() else i
            ax.plot(series["x"], y, color=SERIES_COLOURS[k % len(SERIES_COLOURS)], linewidth=1.3, marker="o",
                    markersize=3, label=name)
    for marker in panel["markers"]:
        if marker["kind"] == "best" and marker["y"] is not None:
            ax.plot([marker["x"]], [marker["y"]], linestyle="none", marker="o", markersize=9, markerfacecolor="none",
                    markeredgecolor=MARK, markeredgewidth=1.1, label=f"best ({marker['metric']})", zorder=4)
        elif marker["kind"] == "early_stop":
            ax.axvline(marker["x"], color=MARK, linestyle=":", linewidth=1.0, label="early stop", zorder=1)
    if panel["log"]:  # spans of several decades (losses, phases at P = 1, gradient norms): ticks in plain numbers
        ax.set_yscale("log")
        ax.yaxis.set_major_formatter(FuncFormatter(lambda value, _: f"{value:.3g}"))
        ax.yaxis.set_minor_formatter(FuncFormatter(_minor_label))
    if panel["fraction"]:  # from 0, so a flat 0 reads as 0 and a small share as small
        values = [v for series in panel["series"].values() for v in series["y"] if v is not None]
        ax.set_ylim(0.0, max([0.05, *(1.15 * v for v in values)]))
    if panel["x_label"] == "epoch":
        ax.xaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_ylabel(panel["y_label"], fontsize=8, color=INK)
    ax.tick_params(which="both", labelsize=7, colors=INK)
    ax.grid(True, axis="y", color=GRID, linewidth=0.8)
    ax.set_axisbelow(True)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    for side in ("left", "bottom"):
        ax.spines[side].set_color(FRAME)
    if len(panel["series"]) + len(panel["markers"]) > 1 or any(name.startswith("layer ") for name in panel["series"]):
        ax.legend(fontsize=7, frameon=False, loc="best", ncols=2 if len(panel["series"]) > 4 else 1)


def _minor_label(value: float, _: int) -> str:
    """Label the 2× and 5× minor ticks of a log axis (so a span under a decade still reads), no others."""
    mantissa = value / 10 ** math.floor(math.log10(value) + 1e-9) if value > 0 else 0.0
    return f"{value:.3g}" if round(mantissa, 6) in (2.0, 5.0) else ""


# --------------------------------------------------------------------------------------------------------
# The command
# --------------------------------------------------------------------------------------------------------


def cmd_curves(args: Any) -> int:
    """`shardmill curves SOURCE [--out-dir DIR]`: draw the curves; one line per file written.

    ``args.source``: a workdir of `shardmill train` or its metrics.jsonl; ``args.out_dir``: a folder, or None
    for ``curves/`` inside the workdir (beside metrics.jsonl). Notes on skipped lines go to stderr.
    """
    path = metrics_path(Path(args.source))
    metrics = read_metrics(path)
    for note in metrics["notes"]:
        print(f"shardmill: note: {note}", file=sys.stderr)
    out_dir = Path(args.out_dir) if args.out_dir is not None else path.parent / "curves"
    for written in write_curves(metrics, out_dir):
        print(f"wrote {written}")
    return 0
