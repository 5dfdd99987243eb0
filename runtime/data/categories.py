"""Categorical input columns: the vocabulary of each, fixed from the training rows when the table is read.

Rank 0 reads a job's categorical columns (CSV fields or Parquet values, as text in memory), fixes each vocabulary
from the training rows of the job's split, and every rank receives the vocabularies and each row's code.
``model/vocabulary.py`` holds what a value's code is (the canonical text, the sorted vocabulary, the unknown slot),
the width rule and the limits.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
from shardmill.config import Job
from shardmill.data.rows import split_rows
from shardmill.data.tables import Table, _errors, describe, read_text
from shardmill.errors import JobError
from shardmill.model.vocabulary import Category, canonical, check_limits, default_width, vocabulary_of

if TYPE_CHECKING:
    from shardmill.parallel.comm import Comm

def read_columns(table: Table, names: list[str], key: str) -> list[list[str]]:
    """Every row's canonical text of each of ``names`` (in memory: one Python string per value), column by column."""
    return [[canonical(value) for value in column] for column in read_text(table, names, key)]


def widths_of(job: Job, vocabularies: list[list[str]]) -> list[int]:
    """Each column's embedding width: ``data.embedding_widths`` where given, else :func:`default_width`."""
    given = job.data.embedding_widths
    out = []
    for k, (name, vocabulary) in enumerate(zip(job.data.categorical, vocabularies, strict=True)):
        if isinstance(given, dict) and name in given:
            out.append(given[name])
        elif isinstance(given, list) and given:
            out.append(given[k])
        else:
            out.append(default_width(len(vocabulary)))
    return out


def categories_from_rows(job: Job, columns: list[list[str]]) -> tuple[list[Category], np.ndarray]:
    """The vocabularies (from the training rows of the job's split) and the codes (n, c) int64 of every row."""
    n = len(columns[0])
    if job.data.validation:  # the validation rows are a table of their own: every row here trains
        train = np.arange(n)
    else:  # (groups with categories are refused by the job's checks)
        train = split_rows(n, job.data.validation_fraction, job.run.seed, job.data.folds, job.data.fold,
                           how=job.data.split).train
    vocabularies = [vocabulary_of([texts[i] for i in train.tolist()]) for texts in columns]
    widths = widths_of(job, vocabularies)
    categories = [Category(name, vocabulary, width)
                  for name, vocabulary, width in zip(job.data.categorical, vocabularies, widths, strict=True)]
    check_limits(categories)
    codes = np.empty((n, len(categories)), dtype=np.int64)
    for k, (c, texts) in enumerate(zip(categories, columns, strict=True)):
        codes[:, k] = c.encode(texts)
    return categories, codes


def load_categories(job: Job, comm: Comm) -> tuple[list[Category], np.ndarray | None]:
    """The job's categorical columns: (categories, codes (n, c) int64), the same on every rank; ([], None) without
    ``data.categorical``.

    Collective. Rank 0 reads the columns (as text, in memory) and fixes the vocabularies; every rank receives them
    (a start-up control message) and the codes (one broadcast of n·c int64). Failures are raised on every rank.
    """
    names = list(job.data.categorical)
    if not names:
        return [], None
    path = job.path(job.data.inputs)

    def read():
        if comm.rank != 0:
            return None
        if path.suffix.lower() not in (".csv", ".parquet"):
            raise JobError(f"`data.categorical` selects columns by name, but `data.inputs` {str(path)!r} is an array "
                           f"without column names; store the inputs as .csv or .parquet")
        table = describe(path, "data.inputs", job.data.header)
        categories, codes = categories_from_rows(job, read_columns(table, names, "data.categorical"))
        if job.data.validation:  # its rows come after the inputs' (data/validation.py), coded by the same words
            other = describe(job.path(job.data.validation), "data.validation", job.data.header)
            columns = read_columns(other, names, "data.categorical")
            codes = np.vstack([codes, np.column_stack([c.encode(v) for c, v in zip(categories, columns, strict=True)])
                               if columns[0] else np.zeros((0, len(names)), dtype=np.int64)])
        return [c.record() for c in categories], codes

    result = _errors(comm, read)
    records, codes = result if comm.rank == 0 else (None, None)
    records = comm.broadcast_object(records)
    shape = comm.broadcast_object(codes.shape if comm.rank == 0 else None)
    if comm.rank != 0:
        codes = np.empty(shape, dtype=np.int64)
    comm.broadcast(codes)
    return [Category.from_record(r) for r in records], codes


def embedding_shapes(categories: list[Category]) -> list[tuple[str, int, int]]:
    """(column, rows, width) of each embedding table, as :class:`shardmill.model.mlp.MLP` takes them."""
    return [(c.column, c.rows, c.width) for c in categories]

