"""The installed version of shardmill (pyproject.toml is the one place it is written)."""

from __future__ import annotations

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("shardmill")
except PackageNotFoundError:  # the sources imported without being installed
    __version__ = "0+unknown"
