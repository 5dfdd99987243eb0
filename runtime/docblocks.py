"""Generated blocks of Markdown files (README's job keys, docs/models.md's tables), between two marker lines.

A block is the text after the line ``begin`` up to ``end``; the code that owns the facts writes it, and a test
checks that the file holds what the code would write.
"""

from __future__ import annotations

from pathlib import Path


def block_between(text: str, begin: str, end: str) -> str:
    """The generated block of ``text``: what stands after the line ``begin`` and before ``end``."""
    return text.split(begin + "\n", 1)[1].split(end, 1)[0]


def replace_block(path: str | Path, begin: str, end: str, block: str) -> None:
    """Rewrite the file ``path`` with ``block`` in place of its generated block between ``begin`` and ``end``."""
    path = Path(path)
    text = path.read_text()
    head, rest = text.split(begin + "\n", 1)
    _, tail = rest.split(end, 1)
    path.write_text(head + begin + "\n" + block + end + tail)
