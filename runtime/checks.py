"""The kinds of job key: how each is checked, what type it holds, how README describes it, how ``--set`` reads it.

Every key of ``config.SCHEMA`` names one kind. A kind is one :class:`Kind` entry in :data:`KINDS`, and nowhere else
is a kind interpreted: the validation pass, the spec dataclasses' field types, the README's "allowed" cell and the
``--set`` reader all look the kind up here. Errors are :class:`JobError` with a message of the shape
"`optimizer.method` must be one of adam, adamw, momentum, nesterov, sgd; got 'adma' (did you mean 'adam'?)".
"""

from __future__ import annotations

import difflib
import itertools
import math
import numbers
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, Protocol

from shardmill.errors import JobError

MAX_PARAMS = 2**31
"""The most parameters a model may have: flat offsets stay within int32-sized views, and 2^31 float32 values
are 8 GiB for the parameters alone (gradients and optimizer state come on top)."""


class KeyLike(Protocol):
    """What a kind reads of a key (``config.Key``)."""

    path: str
    kind: str
    default: Any
    choices: tuple[str, ...]
    low: float | None
    high: float | None
    low_open: bool
    allowed: str


def hint(value: object, allowed: tuple[str, ...] | list[str]) -> str:
    """`` (did you mean 'x'?)`` for the closest allowed name, or nothing."""
    close = difflib.get_close_matches(str(value), list(allowed), n=1, cutoff=0.6)
    return f" (did you mean '{close[0]}'?)" if close else ""


def choice(path: str, value: object, allowed: tuple[str, ...]) -> str:
    """``value`` when it is one of ``allowed``, else a JobError naming ``path`` and listing them."""
    if not isinstance(value, str) or value not in allowed:
        raise JobError(f"`{path}` must be one of {', '.join(sorted(allowed))}; got {value!r}{hint(value, allowed)}")
    return value


def finite(value: object) -> bool:
    """A real number that is finite as a float: an int beyond float's range (10**400) is not (math.isfinite would
    raise OverflowError on it)."""
    try:
        return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(float(value))
    except OverflowError:
        return False


def _number(key: KeyLike, value: object) -> Any:
    integer = key.kind == "integer"
    ok_type = isinstance(value, int) if integer else isinstance(value, (int, float))
    if isinstance(value, bool) or not ok_type or (not integer and not finite(value)):
        raise JobError(f"`{key.path}` must be {'an integer' if integer else 'a number'}; got {value!r}")
    low, high = key.low, key.high
    if low is not None and (value <= low if key.low_open else value < low):
        raise JobError(f"`{key.path}` must be {'>' if key.low_open else '≥'} {low:g}; got {value!r}")
    if high is not None and value > high:
        raise JobError(f"`{key.path}` must be ≤ {high:g}; got {value!r}")
    return int(value) if integer else float(value)


def _number_allowed(key: KeyLike) -> str:
    integer = "integer " if key.kind == "integer" else ""
    if key.high is None:
        return f"{integer}{'>' if key.low_open else '≥'} {key.low:g}"
    return f"{integer}{'(' if key.low_open else '['}{key.low:g}, {key.high:.12g}]"  # :g would show 0.999999999 as 1


def _flag(key: KeyLike, value: object) -> bool:
    if not isinstance(value, bool):
        raise JobError(f"`{key.path}` must be true or false; got {value!r}")
    return value


def _layers(key: KeyLike, value: object) -> list[int]:
    # numbers.Integral also admits numpy integers, so MLP(np.array([...])) works; they are stored as int.
    if (not isinstance(value, list) or len(value) < 2
            or not all(isinstance(n, numbers.Integral) and not isinstance(n, bool) and n >= 1 for n in value)):
        raise JobError(f"`{key.path}` must be a list of at least two positive integers "
                       f"(inputs, hidden…, outputs); got {value!r}")
    widths = [int(n) for n in value]
    params = sum(a * b + b for a, b in itertools.pairwise(widths))
    if params > MAX_PARAMS:
        raise JobError(f"`{key.path}` = {widths} gives {params:,} parameters; at most {MAX_PARAMS:,} (2^31) are "
                       f"allowed")
    return widths


def _names(key: KeyLike, value: object) -> str | list[str]:
    if isinstance(value, (list, tuple)):
        return [choice(key.path, name, key.choices) for name in value]
    return choice(key.path, value, key.choices)


def _rates(key: KeyLike, value: object) -> float | list[float]:
    """A rate in [low, high) or a list of them (``model.dropout``: one, or one per hidden layer)."""
    def rate(v: object) -> float:
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not (key.low <= v < key.high):
            raise JobError(f"`{key.path}` must be a rate in [{key.low:g}, {key.high:g}) or a list of them; got {v!r}")
        return float(v)
    if isinstance(value, (list, tuple)):
        return [rate(v) for v in value]
    return rate(value)


def _file(key: KeyLike, value: object) -> str:
    if not isinstance(value, str):
        raise JobError(f"`{key.path}` must be a file path (.npy, .npz, .csv or .parquet); got {value!r}")
    return value


def _text(key: KeyLike, value: object) -> str:
    if not isinstance(value, str) or not value.strip():
        raise JobError(f"`{key.path}` must be {key.allowed or 'text'}; got {value!r}")
    return value


def _columns(key: KeyLike, value: object) -> str | list[str]:
    """Column names: one name or a list (``data.target``), or a list (``data.features``); names are non-empty."""
    if value == "":
        return key.default
    names = [value] if isinstance(value, str) and not isinstance(key.default, list) else value
    if not isinstance(names, list) or not all(isinstance(n, str) and n for n in names):
        raise JobError(f"`{key.path}` must be {key.allowed}; got {value!r}")
    if len(set(names)) != len(names):
        raise JobError(f"`{key.path}` names a column twice; got {value!r}")
    return value if isinstance(value, str) else list(names)


def _class_weights(key: KeyLike, value: object) -> str | list[float]:
    """"" (none), "balanced", or a list of finite numbers ≥ 0 (one per class, counted against the model later)."""
    if value in ("", "balanced"):
        return value
    numbers_ok = isinstance(value, list) and value and all(
        finite(v) and v >= 0 for v in value)
    if not numbers_ok:
        raise JobError(f"`{key.path}` must be \"balanced\" or a list of numbers ≥ 0, one per class; got {value!r}")
    if not any(value):
        raise JobError(f"`{key.path}` must give some class a weight above 0; got {value!r}")
    return [float(v) for v in value]


def _widths(key: KeyLike, value: object) -> dict[str, int] | list[int]:
    """Embedding widths: a table {column = width} or a list of widths, each an integer ≥ 1 (``[]``, ``{}``: none)."""
    def width(v: object) -> int:
        if isinstance(v, bool) or not isinstance(v, int) or v < 1:
            raise JobError(f"`{key.path}` must hold integer widths ≥ 1; got {v!r}")
        return v
    if isinstance(value, dict):
        if not all(isinstance(name, str) and name for name in value):
            raise JobError(f"`{key.path}` must name columns; got {value!r}")
        return {name: width(v) for name, v in value.items()}
    if isinstance(value, list):
        return [width(v) for v in value]
    raise JobError(f"`{key.path}` must be {key.allowed}; got {value!r}")


@dataclass(frozen=True)
class Kind:
    """One kind of key. ``check(key, value)`` returns the value in the spec's type or raises JobError;
    ``python_type`` is the spec field's type; ``allowed(key)`` is README's "allowed" cell when the key gives none;
    ``text``: a ``--set`` value that TOML reads as a number, date or boolean is kept as the text typed."""

    check: Callable[[KeyLike, object], Any]
    python_type: Any
    allowed: Callable[[KeyLike], str]
    text: bool = False


KINDS: dict[str, Kind] = {
    "choice": Kind(lambda key, value: choice(key.path, value, key.choices), str,
                   lambda key: ", ".join(sorted(key.choices)), text=True),
    "names": Kind(_names, list[str], lambda key: ", ".join(sorted(key.choices)) + "; or a list of them", text=True),
    # model.output: its allowed values depend on model.loss, so config.model_spec checks it after the table pass
    "output": Kind(lambda key, value: value, str, lambda key: ", ".join(sorted(key.choices)), text=True),
    "integer": Kind(_number, int, _number_allowed),
    "number": Kind(_number, float, _number_allowed),
    "flag": Kind(_flag, bool, lambda key: "true, false"),
    "layers": Kind(_layers, list[int], lambda key: "a list of ≥ 2 positive integers"),
    "rates": Kind(_rates, Any, lambda key: f"a number in [{key.low:g}, {key.high:g}); or a list of them"),
    "file": Kind(_file, str, lambda key: "a file path", text=True),
    "text": Kind(_text, str, lambda key: "text", text=True),
    "columns": Kind(_columns, Any, lambda key: "column names", text=True),
    "widths": Kind(_widths, Any, lambda key: "a table of column = width, or a list of widths"),
    "class_weights": Kind(_class_weights, Any, lambda key: "balanced, or a list of numbers ≥ 0 (one per class)",
                          text=True),
}
"""Every kind of job key, by the name ``config.Key.kind`` gives."""


def check(key: KeyLike, value: object) -> Any:
    """The value of ``key`` checked against its row of the schema, in the type the spec holds."""
    return KINDS[key.kind].check(key, value)


def allowed(key: KeyLike) -> str:
    """README's "allowed" cell of ``key``."""
    return key.allowed or KINDS[key.kind].allowed(key)
