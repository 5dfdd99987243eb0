"""``shardmill saves WORKDIR``: the checkpoints a run holds, each verified against its recorded checksums.

One row per checkpoint the index lists (oldest first): step, epoch, when it was written, the training and validation
loss of the epoch record at that step in metrics.jsonl (when the checkpoint fell on an epoch end), its size on disk,
and whether every file still matches the SHA-256 recorded when it was written. ``final.npz`` and ``best.npz`` follow.
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


def _epoch_losses(workdir: Path) -> dict[int, dict[str, float | None]]:
    """step -> {"train_loss", "validation_loss"} of the epoch records in metrics.jsonl (the last record per step)."""
    found: dict[int, dict[str, float | None]] = {}
    path = workdir / "metrics.jsonl"
    if not path.is_file():
        return found
    for line in path.read_text(errors="replace").splitlines():
        try:
            record = json.loads(line)
        except json.JSONDecodeError:
            continue  # a torn last line of an interrupted run
        if isinstance(record, dict) and record.get("kind") == "epoch" and "step" in record:
            found[int(record["step"])] = {"train_loss": (record.get("train") or {}).get("loss"),
                                          "validation_loss": (record.get("validation") or {}).get("loss")}
    return found


def list_saves(workdir: Path) -> list[dict[str, Any]]:
    """Every checkpoint of ``workdir`` (or of a ``checkpoints`` folder given directly), verified, then the model files.

    Each row: name, step, epoch, written (UTC, ISO 8601), train_loss, validation_loss (None when the step was not an
    epoch end), bytes, verified (True, or the reason it failed), best and newest flags.
    """
    workdir = Path(workdir)
    root = workdir if workdir.name == "checkpoints" else workdir / "checkpoints"
    run = root.parent
    if not root.is_dir() and not (run / "final.npz").is_file():
        raise JobError(f"`WORKDIR` {str(workdir)!r} holds no checkpoints (no {str(root)!r}) and no final.npz")
    entries = checkpoint.read_index(root) if root.is_dir() else []
    losses = _epoch_losses(run)
    rows: list[dict[str, Any]] = []
    for i, entry in enumerate(entries):
        folder = root / entry["name"]
        try:
            state, _, _ = checkpoint.load(folder)  # recomputes the SHA-256 of every file
            verified: bool | str = True
            if entry.get("state_sha256") and checkpoint.sha256(folder / "state.json") != entry["state_sha256"]:
                verified = "state.json differs from the index's checksum"
        except checkpoint.CheckpointError as err:
            state, verified = {}, str(err)
        step = int(entry.get("step", state.get("step", -1)))
        rows.append({"name": entry["name"], "step": step, "epoch": entry.get("epoch", state.get("epoch")),
                     "written": entry.get("written"), **losses.get(step, {"train_loss": None,
                                                                           "validation_loss": None}),
                     "bytes": _size(folder) if folder.exists() else 0, "verified": verified,
                     "best": bool(entry.get("best")), "newest": i == len(entries) - 1})
    for name in ("final.npz", "best.npz"):
        path = run / name
        if path.is_file():
            rows.append(_model_file(path, losses))
    return rows


def _model_file(path: Path, losses: dict[int, dict[str, float | None]]) -> dict[str, Any]:
    """A row for final.npz or best.npz: its step, and whether numpy can read every array in it."""
    step: int | None = None
    try:
        with np.load(path, allow_pickle=False) as archive:
            for key in archive.files:
                archive[key]  # zip's CRC-32 is checked as each member is read
            step = int(archive["step"]) if "step" in archive.files else None
        verified: bool | str = True
    except (OSError, ValueError, zipfile.BadZipFile, EOFError) as err:
        verified = f"cannot be read: {err}"
    written = datetime.fromtimestamp(path.stat().st_mtime, UTC).isoformat(timespec="seconds")
    return {"name": path.name, "step": step, "epoch": None, "written": written,
            **losses.get(step if step is not None else -1, {"train_loss": None, "validation_loss": None}),
            "bytes": path.stat().st_size, "verified": verified, "best": path.name == "best.npz", "newest": False}


def _number(value: float | None) -> str:
    return "-" if value is None else f"{value:.4f}"


def _bytes(n: int) -> str:
    for unit, size in (("GiB", 2**30), ("MiB", 2**20), ("KiB", 2**10)):
        if n >= size:
            return f"{n / size:.1f} {unit}"
    return f"{n} B"


def format_saves(rows: list[dict[str, Any]]) -> str:
    """The rows as an aligned text table."""
    head = ("name", "step", "epoch", "written (UTC)", "train.loss", "validation.loss", "size", "checksums")
    table = [head]
    for row in rows:
        marks = ", ".join(m for m, on in (("best", row["best"]), ("newest", row["newest"])) if on)
        table.append((row["name"] + (f" ({marks})" if marks else ""), "-" if row["step"] is None else str(row["step"]),
                      "-" if row["epoch"] is None else str(row["epoch"]), str(row["written"] or "-"),
                      _number(row["train_loss"]), _number(row["validation_loss"]), _bytes(row["bytes"]),
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
