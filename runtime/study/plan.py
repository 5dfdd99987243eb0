"""A plan of variants of one job (``shardmill variants JOB PLAN.toml``), read and checked before any rank trains.

A plan is TOML with up to three parts, every one optional but at least one variant must result::

    [study]
    metric = "validation.loss"        # what ranks the variants (lower is better for a loss or an RMSE)
    ranks_per_variant = 2             # g: ranks that train one variant together; 0 = chosen (see allocation.py)
    seeds = [0, 1, 2]                 # run.seed values: one more axis
    folds = 5                         # k-fold cross-validation: data.folds = 5, data.fold = 0 … 4 as one more axis
    groups = "machine"           # data.groups: whole groups per fold; empty: contiguous blocks
    folder = "study"                  # where the variants' workdirs and the tables go, relative to the plan

    [grid]                            # every combination of these values is a variant
    "optimizer.learning_rate" = [0.01, 0.001]
    "model.layers" = [[16, 32, 5], [16, 64, 5]]

    [[variant]]                       # explicit variants, each a list of --set assignments (crossed with the grid)
    set = ["optimizer.method=sgd", "optimizer.momentum=0.5"]

Each variant's job is the job file with the command line's ``--set``, then the variant's assignments, then its own
``run.workdir`` applied, built by ``config.job_from_dict`` like any ``train --set`` run, so a value the schema
refuses stops the study here with one line naming the plan entry.
"""

from __future__ import annotations

import hashlib
import itertools
import json
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from shardmill.checks import hint
from shardmill.config import Job, job_from_dict, parse_override
from shardmill.errors import JobError
from shardmill.model.losses import LOSSES

METRICS = ("validation.loss", "validation.accuracy", "validation.rmse", "train.loss", "train.accuracy", "train.rmse")
STUDY_KEYS = {"metric": "validation.loss", "ranks_per_variant": 0, "seeds": [], "folds": 0, "groups": "",
              "folder": "study"}
PARTS = ("study", "grid", "variant")


@dataclass(frozen=True)
class Variant:
    """One variant: its place in the plan, its folder name, its ``--set`` assignments (in order) and its setting
    (the assignments without the fold's, which name what k-fold averages over)."""

    index: int
    name: str
    sets: tuple[str, ...]
    setting: tuple[str, ...]


@dataclass
class Plan:
    """A checked plan: the study's options and the variants in plan order."""

    path: Path
    metric: str = "validation.loss"
    ranks_per_variant: int = 0
    folds: int = 0
    folder: Path = Path("study")
    variants: list[Variant] = field(default_factory=list)
    varied: list[str] = field(default_factory=list)  # the keys the variants set, in first-seen order


def toml_value(value: Any) -> str:
    """A TOML value as ``--set`` reads it: numbers, booleans, strings and lists of them."""
    if isinstance(value, dict):
        raise TypeError("a table")
    if isinstance(value, list):
        return "[" + ", ".join(toml_value(v) for v in value) + "]"
    return json.dumps(value, ensure_ascii=False)  # true/false, numbers and basic strings read the same in TOML


def _study(table: Any, where: str) -> dict[str, Any]:
    if not isinstance(table, dict):
        raise JobError(f"{where}: `study` must be a table; got {table!r}")
    for name in table:
        if name not in STUDY_KEYS:
            raise JobError(f"{where}: `study.{name}` is not a known key; allowed: {', '.join(STUDY_KEYS)}"
                           f"{hint(name, list(STUDY_KEYS))}")
    options = {**STUDY_KEYS, **table}
    if options["metric"] not in METRICS:
        raise JobError(f"{where}: `study.metric` must be one of {', '.join(METRICS)}; got {options['metric']!r}"
                       f"{hint(options['metric'], METRICS)}")
    for name in ("ranks_per_variant", "folds"):
        value = options[name]
        if isinstance(value, bool) or not isinstance(value, int) or value < 0 or (name == "folds" and value == 1):
            allowed = "0 (off) or an integer ≥ 2" if name == "folds" else "an integer ≥ 0 (0: chosen)"
            raise JobError(f"{where}: `study.{name}` must be {allowed}; got {value!r}")
    seeds = options["seeds"]
    if not isinstance(seeds, list) or not all(isinstance(s, int) and not isinstance(s, bool) for s in seeds):
        raise JobError(f"{where}: `study.seeds` must be a list of integers (values of run.seed); got {seeds!r}")
    for name in ("groups", "folder"):
        if not isinstance(options[name], str) or (name == "folder" and not options[name].strip()):
            raise JobError(f"{where}: `study.{name}` must be text; got {options[name]!r}")
    if options["groups"] and not options["folds"]:
        raise JobError(f"{where}: `study.groups` needs `study.folds` ≥ 2")
    return options


def _grid(table: Any, where: str) -> list[list[str]]:
    """Each grid key's assignments (``key=value`` texts), checked as ``--set`` checks them."""
    if not isinstance(table, dict) or not table:
        raise JobError(f"{where}: `grid` must map \"section.key\" to a list of values; got {table!r}")
    axes = []
    for key, values in table.items():
        entry = f"{where}: `grid.\"{key}\"`" if "." in key else f"{where}: `grid.{key}`"
        if not isinstance(values, list) or not values:
            raise JobError(f"{entry} must be a non-empty list of values; got {values!r}")
        try:
            texts = [f"{key}={toml_value(v)}" for v in values]
        except TypeError:
            raise JobError(f"{entry} holds a table; give numbers, booleans, text or lists") from None
        for text in texts:
            try:
                parse_override(text)
            except JobError as err:
                raise JobError(f"{entry}: {err}") from None
        if len(set(texts)) != len(texts):
            raise JobError(f"{entry} lists a value twice; got {values!r}")
        axes.append(texts)
    return axes


def _explicit(entries: Any, where: str) -> list[list[str]]:
    if not isinstance(entries, list) or not entries:
        raise JobError(f"{where}: `variant` must be an array of tables ([[variant]]), each with `set`")
    out = []
    for n, entry in enumerate(entries):
        name = f"{where}: `variant` {n + 1}"
        if not isinstance(entry, dict) or set(entry) != {"set"}:
            raise JobError(f"{name} must hold one key, `set` (a list of section.key=value); got {entry!r}")
        sets = entry["set"]
        if not isinstance(sets, list) or not sets or not all(isinstance(s, str) for s in sets):
            raise JobError(f"{name}: `set` must be a non-empty list of section.key=value texts; got {sets!r}")
        for text in sets:
            try:
                parse_override(text)
            except JobError as err:
                raise JobError(f"{name}: {err}") from None
        out.append(list(sets))
    return out


def read_plan(path: str | Path, folder: str | Path | None = None) -> tuple[Plan, dict[str, Any]]:
    """The plan file read and its shape checked (not yet against the job): the Plan and its study options.
    ``folder`` (``--out-dir``) replaces ``study.folder``."""
    path = Path(path)
    where = f"plan {str(path)!r}"
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise JobError(f"{where} does not exist") from None
    except (OSError, UnicodeDecodeError) as err:
        raise JobError(f"{where} cannot be read: {err}") from None
    except tomllib.TOMLDecodeError as err:
        raise JobError(f"{where} is not valid TOML: {err}") from None
    for part in raw:
        if part not in PARTS:
            raise JobError(f"{where}: `{part}` is not a part of a plan; allowed: {', '.join(PARTS)}"
                           f"{hint(part, list(PARTS))}")
    options = _study(raw.get("study", {}), where)
    explicit = _explicit(raw["variant"], where) if "variant" in raw else [[]]
    axes = _grid(raw["grid"], where) if "grid" in raw else []
    seeds = [[f"run.seed={s}"] for s in dict.fromkeys(options["seeds"])] or [[]]
    k = options["folds"]
    groups = [f"data.groups={toml_value(options['groups'])}"] if options["groups"] else []
    folds = [[f"data.folds={k}", f"data.fold={f}", *groups] for f in range(k)] or [[]]
    variants, varied = [], []
    for base, combination, seed, fold in itertools.product(explicit, itertools.product(*axes), seeds, folds):
        setting = tuple(base) + tuple(combination) + tuple(seed)
        sets = setting + tuple(fold)
        digest = hashlib.sha256("\n".join(sets).encode()).hexdigest()[:8]
        variants.append(Variant(len(variants), f"{len(variants):04d}-{digest}", sets, setting))
        varied += [text.split("=")[0].strip() for text in sets if text.split("=")[0].strip() not in varied]
    if len({v.sets for v in variants}) != len(variants):
        raise JobError(f"{where}: two variants have the same assignments; each variant must differ")
    out = Path(folder) if folder is not None else path.parent / options["folder"]
    plan = Plan(path=path, metric=options["metric"], ranks_per_variant=options["ranks_per_variant"], folds=k,
                folder=out, variants=variants, varied=varied)
    return plan, options


def variant_jobs(plan: Plan, raw_job: dict[str, Any], base: Path, sets: list[str]) -> list[Job]:
    """Every variant's job, checked like ``train --set`` checks one; the first refusal names its variant."""
    jobs = []
    for variant in plan.variants:
        overrides = [*sets, *variant.sets, f"run.workdir={workdir(plan, variant).resolve()}"]
        try:
            job = job_from_dict(raw_job, base=base, overrides=overrides)
        except JobError as err:
            what = " ".join(variant.sets) or "the job as it is"
            raise JobError(f"plan {str(plan.path)!r}: variant {variant.name} ({what}): {err}") from None
        loss = LOSSES[job.model.loss]
        offered = {m.split(".")[1] for m in loss.best_metrics}
        if plan.metric.split(".")[1] not in offered or (plan.metric.startswith("validation.") and
                                                         not (job.data.validation_fraction or job.data.folds)):
            raise JobError(f"plan {str(plan.path)!r}: `study.metric` = {plan.metric!r} is not measured by variant "
                           f"{variant.name} (`model.loss` = {job.model.loss!r}, validation rows: "
                           f"{'yes' if job.data.validation_fraction or job.data.folds else 'none'})")
        jobs.append(job)
    return jobs


def workdir(plan: Plan, variant: Variant) -> Path:
    """The variant's own workdir: a normal run's folder under the study's."""
    return plan.folder / "variants" / variant.name
