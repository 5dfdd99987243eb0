"""``shardmill saves WORKDIR``: the checkpoints a run holds, each verified against its recorded checksums.

One row per checkpoint the index lists (oldest first): step, epoch, when it was written, the training and validation
loss of the epoch record at that step in metrics.jsonl (when the checkpoint fell on an epoch end) and the metric the
run watched (``run.best_metric``) when it was another, its size on disk, and whether every file still matches the
SHA-256 recorded when it was written (and its HMAC tag, with a checkpoint key configured). ``final.npz`` and
``best.npz`` follow. Numbers are printed with five significant digits.
"""

from __future__ import annotations

import json
import zipfile
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
from shardmill import checkpoint
from shardmill.errors import JobError


def _size(path: Path) -> int:
    """Bytes of a file, or of every file under a folder."""
    if path.is_file():
        return path.stat().st_size
    return sum(p.stat().st_size for p in path.rglob("*") if p.is_file())


def _field(record: object, path: str) -> object:
    """The value at a dotted ``path`` ("validation.loss") of a metrics record, or None."""
    for key in path.split("."):
        record = record.get(key) if isinstance(record, dict) else None
    return record


def _epoch_losses(workdir: Path) -> tuple[dict[int, dict[str, Any]], str | None]:
    """(step -> {"train_loss", "validation_loss"[, the watched metric's key]} of the epoch records in metrics.jsonl
    (the last record per step), the run's ``run.best_metric`` when it watched another metric than validation.loss)."""
    found: dict[int, dict[str, Any]] = {}
    path = workdir / "metrics.jsonl"
    if not path.is_file():
        return found, None
    records = []
    for line in path.read_text(errors="replace").splitlines():
        try:
            records.append(json.loads(line))
        except (json.JSONDecodeError, RecursionError):
            continue  # a torn last line of an interrupted run
    watched = None
    for record in records:
        if _field(record, "kind") == "start":
            metric = _field(record, "job.run.best_metric")
            watched = metric if isinstance(metric, str) and metric not in ("off", "validation.loss") else None
    for record in records:
        step = _field(record, "step")
        if _field(record, "kind") == "epoch" and isinstance(step, int) and not isinstance(step, bool):
            found[step] = {"train_loss": _field(record, "train.loss"),
                           "validation_loss": _field(record, "validation.loss")}
            if watched:
                found[step][_key(watched)] = _field(record, watched)
    return found, watched


def _key(metric: str) -> str:
    """A row's key for a metric path: validation.accuracy -> validation_accuracy."""
    return metric.replace(".", "_")


def list_saves(workdir: Path) -> list[dict[str, Any]]:
    """Every checkpoint of ``workdir`` (or of a ``checkpoints`` folder given directly), verified, then the model files.

    Each row: name, step, epoch, written (UTC, ISO 8601), train_loss, validation_loss (None when the step was not an
    epoch end), the watched metric (``validation_accuracy``, ``validation_rmse``) when ``run.best_metric`` named it,
    bytes, verified (True, or the reason it failed), best and newest flags.
    """
    workdir = Path(workdir)
    root = workdir if workdir.name == "checkpoints" else workdir / "checkpoints"
    run = root.parent
    if not root.is_dir() and not (run / "final.npz").is_file():
        raise JobError(f"`WORKDIR` {str(workdir)!r} holds no checkpoints (no {str(root)!r}) and no final.npz")
    entries = checkpoint.read_index(root) if root.is_dir() else []  # a damaged index: one line, exit 2
    losses, watched = _epoch_losses(run)
    empty = {"train_loss": None, "validation_loss": None, **({_key(watched): None} if watched else {})}
    rows: list[dict[str, Any]] = []
    for i, entry in enumerate(entries):
        folder = root / entry["name"]
        try:
            checkpoint.load(folder)  # every file's SHA-256, the index's of state.json, the HMAC tag with a key
            verified: bool | str = True
        except checkpoint.CheckpointError as err:
            verified = str(err)
        step = entry["step"]  # read_index checked it against the folder's name
        rows.append({"name": entry["name"], "step": step, "epoch": entry.get("epoch"),
                     "written": entry.get("written"), **losses.get(step, empty),
                     "bytes": _size(folder) if folder.exists() else 0, "verified": verified,
                     "best": bool(entry.get("best")), "newest": i == len(entries) - 1})
    for name in ("final.npz", "best.npz"):
        path = run / name
        if path.exists():
            rows.append(_model_file(path, losses, empty))
    return rows


def _model_file(path: Path, losses: dict[int, dict[str, Any]], empty: dict[str, None]) -> dict[str, Any]:
    """A row for final.npz or best.npz: its step, and whether numpy can read every array in it (and, with a
    checkpoint key configured, whether its HMAC tag matches)."""
    step: int | None = None
    verified: bool | str = True
    if not path.is_file():
        verified = "is not a file"
    else:
        try:
            with np.load(path, allow_pickle=False) as archive:
                arrays = {key: archive[key] for key in archive.files}  # zip's CRC-32 is checked as each is read
            checkpoint.check_model_tag(path, arrays)
            step = int(arrays["step"]) if "step" in arrays else None
        except checkpoint.CheckpointError as err:
            verified = str(err)
        except (OSError, ValueError, TypeError, zipfile.BadZipFile, EOFError) as err:
            verified = f"cannot be read: {str(err)[:120] or type(err).__name__}"
    written = datetime.fromtimestamp(path.stat().st_mtime, UTC).isoformat(timespec="seconds")
    return {"name": path.name, "step": step, "epoch": None, "written": written,
            **losses.get(step if step is not None else -1, empty),
            "bytes": _size(path), "verified": verified, "best": path.name == "best.npz", "newest": False}


def _number(value: object) -> str:
    """Five significant digits (a regression loss of 3e-05 stays visible), "-" for a missing value."""
    if isinstance(value, bool) or not isinstance(value, int | float):
        return "-"
    return f"{value:.5g}"


def _bytes(n: int) -> str:
    for unit, size in (("GiB", 2**30), ("MiB", 2**20), ("KiB", 2**10)):
        if n >= size:
            return f"{n / size:.1f} {unit}"
    return f"{n} B"


def format_saves(rows: list[dict[str, Any]]) -> str:
    """The rows as an aligned text table."""
    known = {"name", "step", "epoch", "written", "train_loss", "validation_loss", "bytes", "verified", "best",
             "newest"}
    extra = sorted({key for row in rows for key in row} - known)  # the watched metric (run.best_metric), if another
    head = ("name", "step", "epoch", "written (UTC)", "train.loss", "validation.loss",
            *(key.replace("_", ".", 1) for key in extra), "size", "checksums")
    table = [head]
    for row in rows:
        marks = ", ".join(m for m, on in (("best", row["best"]), ("newest", row["newest"])) if on)
        table.append((row["name"] + (f" ({marks})" if marks else ""), "-" if row["step"] is None else str(row["step"]),
                      "-" if row["epoch"] is None else str(row["epoch"]), str(row["written"] or "-"),
                      _number(row["train_loss"]), _number(row["validation_loss"]),
                      *(_number(row.get(key)) for key in extra), _bytes(row["bytes"]),
                      "verified" if row["verified"] is True else f"FAILED: {row['verified']}"))
    widths = [max(len(r[c]) for r in table) for c in range(len(head) - 1)]
    return "\n".join("  ".join(cell.ljust(w) for cell, w in zip(r[:-1], widths, strict=True)) + "  " + r[-1]
                     for r in table)


DAMAGED_EXIT = 3
"""Exit status of ``shardmill saves`` when a file fails its checksum (as ``verify`` uses 3 for a failed check)."""


def cmd_saves(args) -> int:
    """Print the table (or JSON with --json); exit :data:`DAMAGED_EXIT` when a file fails its checksums."""
    rows = list_saves(Path(args.workdir))
    print(json.dumps(rows, indent=1) if args.json else format_saves(rows))
    return 0 if all(row["verified"] is True for row in rows) else DAMAGED_EXIT
