"""``shardmill variants JOB PLAN.toml``: many variants of a job in one launch, g ranks per variant.

In order, on every rank: read and check the plan and every variant's job (plan.py; a refusal stops the study before
anything trains), split the world into groups of g ranks (``Comm.split``), and let each group ask rank 0 for its
next variant. Rank 0 holds the queue in a thread of its own that answers small control messages on a duplicate of
the world, so it trains in a group like every other rank. A group trains its variant as a normal run in the
variant's own workdir (``training.loop.train`` on the group's communicator, ``resume="auto"``, so a relaunched study
continues an interrupted variant from its checkpoint), writes the variant's record and asks again. A variant that
fails with a user error (bad data, a divergence) is recorded as failed with its one line; anything else ends every
rank, as in any run. SIGTERM or SIGINT stops every group after a checkpoint; the queue hands out nothing more and the
study exits 143 (130), to be relaunched with the same line, on any number of ranks.
"""

from __future__ import annotations

import argparse
import json
import sys
import threading
import time
import tomllib
from pathlib import Path
from typing import Any

import numpy as np
from shardmill.config import Job
from shardmill.errors import JobError, LocalJobError
from shardmill.parallel.comm import Comm, abort_world
from shardmill.study import figure, results
from shardmill.study.plan import Plan, Variant, read_plan, variant_jobs
from shardmill.training.signals import StopSignals, TrainingStopped
from shardmill.training.workdir import WorkdirLock

ASK, ANSWER = 11, 12  # message tags of the queue's control messages (on the duplicate of the world)
DONE, STOP = -1, -2  # answers that are no variant: the queue is empty; a signal stopped the study


def choose_group_ranks(world: int, pending: int, given: int) -> int:
    """g, the ranks per variant: ``given`` when not 0, else the largest divisor of the world that still gives every
    pending variant a group of its own (1 when there are at least as many variants as ranks). Small and mid models
    scale poorly on a data-parallel run, so more groups of fewer ranks use an allocation best (issue 19)."""
    if given:
        if given > world:
            raise JobError(f"`--group-ranks` = {given} needs at least {given} ranks; this study has {world}")
        return given
    wanted = max(1, min(pending, world))
    return max(d for d in range(1, world + 1) if world % d == 0 and world // d >= wanted)


SCALING_EFFICIENCY = 0.8
"""g chosen from a scale study (``--scaling``): the largest measured P whose efficiency is at least this."""


def scaled_group_ranks(path: Path, world: int) -> tuple[int, str]:
    """(g, a sentence saying why) from a ``shardmill scale`` study: the largest measured process count ≤ ``world``
    whose strong-scaling efficiency is at least :data:`SCALING_EFFICIENCY`, and its measured step time. Raises
    JobError for a file that is not such a study."""
    source = path / "scaling.json" if path.is_dir() else path
    try:
        study = json.loads(source.read_text())
        points = [(int(p["p"]), float(p["efficiency"]), float(p["step_s"])) for p in study["points"]]
    except (OSError, ValueError, KeyError, TypeError) as err:
        raise JobError(f"`--scaling` {str(source)!r} is not a `shardmill scale` study: {err}") from None
    if study.get("mode") != "strong":
        raise JobError(f"`--scaling` {str(source)!r} is a {study.get('mode')} scaling study; give a strong one")
    good = [(p, eff, step) for p, eff, step in points if p <= world and eff >= SCALING_EFFICIENCY]
    p, eff, step = max(good) if good else min(points)
    return p, (f"g = {p} from {source}: efficiency {eff:.2f} at P = {p} (the largest measured P at or above "
               f"{SCALING_EFFICIENCY}), a step of {step * 1e3:.3g} ms")


class VariantQueue:
    """Rank 0's queue: a thread answering each group's ASK with the next pending variant, DONE or STOP."""

    def __init__(self, control: Comm, pending: list[int], groups: int, signals: StopSignals) -> None:
        self.control, self.pending, self.groups, self.signals = control, list(pending), groups, signals
        self.stopping = False
        self.busy_rank_s = 0.0  # rank-seconds spent training variants in this launch
        self.thread = threading.Thread(target=self._serve, name="variant-queue", daemon=True)

    def start(self) -> VariantQueue:
        self.thread.start()
        return self

    def _serve(self) -> None:
        try:
            ended = 0
            while ended < self.groups:
                message = self.control.poll_object(tag=ASK)
                if message is None:
                    time.sleep(0.002)
                    continue
                report, source = message
                self.busy_rank_s += report.get("rank_s", 0.0)
                self.stopping = self.stopping or bool(report.get("stop")) or bool(self.signals.received)
                answer = STOP if self.stopping else self.pending.pop(0) if self.pending else DONE
                ended += answer < 0
                self.control.send_object(answer, dest=source, tag=ANSWER)
        except BaseException as err:  # noqa: BLE001 - a broken queue must end the job, never leave ranks waiting
            print(f"shardmill: [rank 0] the variant queue failed: {err!r}", file=sys.stderr, flush=True)
            abort_world(1)


def train_variant(plan: Plan, variant: Variant, job: Job, group: Comm) -> dict[str, Any]:
    """Train one variant on its group (every rank of the group); returns the report for the queue."""
    from shardmill.training.loop import train

    begin = time.perf_counter()
    status, reason, stop = "done", "", 0
    try:
        train(job, comm=group, resume="auto", progress=False, echo=False)
    except TrainingStopped as stopped:
        status, reason, stop = "stopped", str(stopped), stopped.exit_code
    except LocalJobError:
        raise  # one rank's failure mid-step: the others may wait in a collective, so the job ends
    except JobError as err:  # raised alike on every rank of the group: record it and go on
        status, reason = "failed", str(err)
    wall = time.perf_counter() - begin
    if group.rank == 0:
        record = results.write_record(plan, variant, status, reason, wall, group.size)
        value = "" if record["best"] is None else f", {plan.metric} best {record['best']:.6g} final " \
                                                   f"{record['final']:.6g}"
        print(f"variant {variant.name} ({' '.join(variant.sets) or 'the job as it is'}): {status}{value}, "
              f"{record['epochs']} epochs, {wall:.1f} s on {group.size} rank(s)" +
              (f": {reason}" if status == "failed" else ""), flush=True)
    return {"rank_s": wall * group.size, "stop": stop}


def run_groups(plan: Plan, jobs: list[Job], group: Comm | None, control: Comm, signals: StopSignals) -> int:
    """Each group: ask for a variant, train it, until DONE or STOP; returns the exit code of a stop (or 0)."""
    stop = 0
    if group is None:
        return 0
    report: dict[str, Any] = {}
    while True:
        flags = np.array([signals.received], dtype=np.int64)
        group.allreduce_max(flags)  # a signal noted on any rank of the group between variants
        answer = np.array([0], dtype=np.int64)
        if group.rank == 0:
            control.send_object({**report, "stop": report.get("stop") or int(flags[0])}, dest=0, tag=ASK)
            answer[0] = control.receive_object(0, tag=ANSWER)
        group.broadcast_idle(answer)
        if answer[0] < 0:
            return stop or (128 + int(flags[0]) if flags[0] else 0) or (143 if answer[0] == STOP else 0)
        variant = plan.variants[int(answer[0])]
        report = train_variant(plan, variant, jobs[variant.index], group)
        stop = stop or report["stop"]


def check_folds(jobs: list[Job], world: Comm, folder: Path) -> None:
    """Refuse, before anything trains, folds the data cannot give (more folds than rows or groups): every rank
    opens the data once (collective), as a run would."""
    from shardmill.config import job_from_dict
    from shardmill.data.dataset import job_split
    from shardmill.data.files import open_job_data

    seen = set()
    for job in jobs:
        key = (job.data.folds, job.data.groups)
        if not job.data.folds or key in seen:
            continue
        seen.add(key)
        probe = job_from_dict(job.as_dict(), base=job.base, overrides=[f"run.workdir={folder.resolve() / 'data'}"])
        X, _, _ = open_job_data(probe, world)
        job_split(probe, X.shape[0], world)


def cmd_variants(args: argparse.Namespace) -> int:
    """The command: check everything, print how the allocation is used, run the groups, write the table."""
    from shardmill.config import load_job

    world = Comm()
    load_job(args.job, overrides=args.sets)  # the job itself first: its own errors read as a train's would
    plan, _ = read_plan(args.plan, args.out_dir)
    raw = tomllib.loads(Path(args.job).read_text(encoding="utf-8"))
    jobs = variant_jobs(plan, raw, Path(args.job).parent, args.sets)
    with WorkdirLock(plan.folder, world):  # one study per folder (rank 0 holds the lock)
        check_folds(jobs, world, plan.folder)
        pending = world.broadcast_object([v.index for v in plan.variants
                                          if (results.read_record(plan, v) or {}).get("status")
                                          not in results.FINISHED] if world.rank == 0 else None)
        given, why = args.group_ranks or plan.ranks_per_variant, ""
        if not given and getattr(args, "scaling", None) is not None:
            given, why = scaled_group_ranks(args.scaling, world.size)
        g = choose_group_ranks(world.size, len(pending), given)
        groups = world.size // g
        if world.rank == 0:
            idle = world.size - groups * g
            print(f"variants: {len(plan.variants)} in {plan.folder} ({len(plan.variants) - len(pending)} finished "
                  f"before); {world.size} rank(s) as {groups} group(s) × {g} rank(s)"
                  + (f", {idle} rank(s) idle" if idle else "") + f"; ranked by {plan.metric}"
                  + (f"; {why}" if why else ""), flush=True)
        control = world.duplicate()
        color = world.rank // g if world.rank < groups * g else None
        group = world.split(color, key=world.rank)
        begin = time.perf_counter()
        with StopSignals() as signals:
            queue = VariantQueue(control, pending, groups, signals).start() if world.rank == 0 else None
            code = run_groups(plan, jobs, group, control, signals)
            world.barrier_idle()
            if queue is not None:
                queue.thread.join()
        wall = time.perf_counter() - begin
        worst = np.array([code], dtype=np.int64)
        world.allreduce_max(worst)
        if world.rank == 0:
            busy = queue.busy_rank_s / max(world.size * wall, 1e-12)
            usage = {"ranks": world.size, "groups": groups, "ranks_per_variant": g, "wall_s": wall,
                     "busy_rank_s": queue.busy_rank_s, "busy_fraction": busy}
            table = results.table(plan)
            paths = results.write_tables(plan, table, usage)
            picture = figure.draw(plan, table)  # the metric against each varied key; the best few's curves
            counts = {s: sum(row["status"] == s for row in table["variants"]) for s in ("done", "failed")}
            print(f"variants: {counts['done']} done, {counts['failed']} failed, "
                  f"{len(plan.variants) - counts['done'] - counts['failed']} to go; busy fraction of the "
                  f"rank-seconds {busy:.3f} ({world.size} ranks × {wall:.1f} s); table in {paths[0]} and "
                  f"{paths[1]}" + (f", picture in {picture}" if picture else ""), flush=True)
            line = results.best_line(plan, table, str(args.job))
            if line:
                print(line, flush=True)
            if worst[0]:
                print(f"shardmill: the study stopped on a signal (exit {int(worst[0])}); every variant in progress "
                      f"is checkpointed: run the same command again (any number of ranks) to continue",
                      file=sys.stderr, flush=True)
        return int(worst[0])
