"""The vocabulary of a categorical input column: the code of each value, the unknown slot, widths and limits.

A categorical column holds categories as text or integer codes (CSV fields, Parquet strings, integers or booleans).
A value is compared by its *canonical text*: the field stripped of blanks, and an integer literal written as
Python writes the integer (``"07"`` and ``7`` are the same category). The vocabulary of a column is the distinct
values of the *training* rows, sorted (numerically when every value is an integer, else by code point), so it does
not depend on the file's row order nor on the process count. Code 0 is the reserved unknown slot: a value never
seen in training (a validation row's new value, an unseen value at prediction) maps there, so nothing fails on it;
code i ≥ 1 is vocabulary[i − 1]. An empty field or a Parquet null is the value ``""``, a category like any other.

Each column's embedding has ``len(vocabulary) + 1`` rows; its width is ``data.embedding_widths`` or the rule
:func:`default_width`. Limits (:data:`MAX_VOCABULARY`, :data:`MAX_EMBEDDING_VALUES`): every embedding row is a
parameter, so it costs its share of memory three to four times over (parameters, gradient, optimizer state) and is
exchanged *every step* whether or not a row of the batch used it (the exchange sums whole dense layers).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from shardmill.errors import JobError

MAX_VOCABULARY = 100_000
"""Distinct training values one categorical column may hold. At width 16 its table is 1.6 M parameters: 6.4 MB
of float32 sent by every rank every step, and about 26 MB of memory per rank (parameters, gradient, Adam's m, v)."""
MAX_EMBEDDING_VALUES = 4_000_000
"""Parameters all embedding tables together may hold: 16 MB of float32 (32 MB float64) exchanged per step."""
MAX_DEFAULT_WIDTH = 16


@dataclass
class Category:
    """One categorical column: its name, its vocabulary (canonical texts, code i + 1 each) and embedding width."""

    column: str
    vocabulary: list[str]
    width: int

    @property
    def rows(self) -> int:
        """Rows of the embedding table: the vocabulary and the unknown slot (code 0)."""
        return len(self.vocabulary) + 1

    def record(self) -> dict[str, Any]:
        """The plain record checkpoints, final/best models and the model card keep."""
        return {"column": self.column, "vocabulary": list(self.vocabulary), "width": self.width}

    @classmethod
    def from_record(cls, record: dict[str, Any]) -> Category:
        return cls(column=str(record["column"]), vocabulary=[str(v) for v in record["vocabulary"]],
                   width=int(record["width"]))

    def encode(self, values: list[Any]) -> np.ndarray:
        """Codes (n,) int64 of raw values (text, integers): vocabulary position + 1, or 0 for an unseen value."""
        index = {v: i + 1 for i, v in enumerate(self.vocabulary)}
        return np.fromiter((index.get(canonical(v), 0) for v in values), dtype=np.int64, count=len(values))


def canonical(value: Any) -> str:
    """The text a category is compared by: stripped; an integer literal (or integer, boolean) as its integer."""
    if value is None:
        return ""
    if isinstance(value, (bool, np.bool_)):
        return str(int(value))
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)) and float(value).is_integer():
        return str(int(value))
    text = str(value).strip()
    try:
        return str(int(text))
    except ValueError:
        return text


def default_width(values: int) -> int:
    """min(16, ⌈(v + 1)/2⌉) for v distinct training values (common practice: about half the categories, capped)."""
    return max(1, min(MAX_DEFAULT_WIDTH, -(-(values + 1) // 2)))


def vocabulary_of(texts: list[str]) -> list[str]:
    """The distinct canonical texts, sorted numerically when every one is an integer, else by code point."""
    distinct = set(texts)
    try:
        return [str(v) for v in sorted(int(t) for t in distinct)]
    except ValueError:
        return sorted(distinct)


def check_limits(categories: list[Category]) -> None:
    """Refuse a vocabulary above :data:`MAX_VOCABULARY` or embeddings above :data:`MAX_EMBEDDING_VALUES` in all."""
    for c in categories:
        if len(c.vocabulary) > MAX_VOCABULARY:
            raise JobError(f"`data.categorical` column {c.column!r} holds {len(c.vocabulary):,} distinct values in the "
                           f"training rows; at most {MAX_VOCABULARY:,} are allowed (each is an embedding row exchanged "
                           f"every step): group rare values, or hash them into fewer codes")
    total = sum(c.rows * c.width for c in categories)
    if total > MAX_EMBEDDING_VALUES:
        sizes = ", ".join(f"{c.column!r} {c.rows:,} × {c.width}" for c in categories)
        raise JobError(f"the embeddings of `data.categorical` hold {total:,} parameters ({sizes}); at most "
                       f"{MAX_EMBEDDING_VALUES:,} are allowed (exchanged every step): lower "
                       f"`data.embedding_widths` or the number of distinct values")
