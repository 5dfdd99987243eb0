"""The ``shardmill`` command: train, verify, bench, scale, predict, info, demo.

User errors (a bad job, a missing file, a refused checkpoint) print one line and exit 2, with no
traceback; our own bugs print the rank and a full traceback and end every rank.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
from pathlib import Path

from shardmill.config import JobError, choices, default
from shardmill.parallel.launch import LAUNCHED, relaunch, strip_ranks


def _layers(text: str) -> list[int]:
    try:
        layers = [int(x) for x in text.split(",")]
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be comma-separated integers like 784,1024,10; got {text!r}") from None
    if len(layers) < 2 or min(layers) < 1:
        raise argparse.ArgumentTypeError(f"must be at least two positive integers; got {text!r}")
    return layers


def _positive(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a positive integer; got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be a positive integer; got {text!r}")
    return value


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="shardmill", description="Data-parallel MLP training on CPUs over MPI.")
    sub = parser.add_subparsers(dest="command", required=True)

    def ranks(p: argparse.ArgumentParser) -> None:
        p.add_argument("--ranks", type=_positive, default=None,
                       help="start this many processes with the bundled mpiexec (instead of launching it yourself)")

    p = sub.add_parser("train", help="train a job file")
    p.add_argument("job", type=Path)
    again = p.add_mutually_exclusive_group()
    again.add_argument("--resume", action="store_true",
                       help="continue from the newest complete checkpoint in the workdir")
    again.add_argument("--fresh", action="store_true",
                       help="start over in a workdir that holds a run: remove its checkpoints, metrics.jsonl and "
                            "final.npz first")
    p.add_argument("--no-progress", action="store_true", help="no progress bar")
    ranks(p)

    p = sub.add_parser("verify", help="compare the parallel gradient with the serial one on the job's batches")
    p.add_argument("job", type=Path)
    p.add_argument("--batches", type=_positive, default=3, help="global batches to compare (default 3)")
    p.add_argument("--trajectory", type=int, default=0, metavar="N",
                   help="also train N steps serial and parallel and report the weight divergence per step")
    p.add_argument("--json", type=Path, default=None, help="write the JSON report here")
    ranks(p)

    p = sub.add_parser("bench", help="time training steps against the BLAS floor; prints JSON")
    p.add_argument("--layers", type=_layers, default=[784, 1024, 1024, 10])
    p.add_argument("--batch", type=_positive, default=512, help="global batch G")
    p.add_argument("--dtype", choices=choices("model.dtype"), default=default("model.dtype"))
    p.add_argument("--threads", type=_positive, default=default("run.threads"), help="BLAS threads per process")
    p.add_argument("--steps", type=_positive, default=30)
    p.add_argument("--warmup", type=int, default=5)
    p.add_argument("--reduction", choices=choices("run.reduction"), default=default("run.reduction"))
    p.add_argument("--update", choices=choices("run.update"), default=default("run.update"),
                   help="replicated: every rank updates everything; sharded: each rank its own slice")
    p.add_argument("--exact-chunk", type=_positive, default=64)
    p.add_argument("--exact-format", choices=choices("run.exact_format"), default=default("run.exact_format"))
    p.add_argument("--progress", choices=choices("run.progress"), default=default("run.progress"),
                   help="who drives the overlapped reductions (see the job key run.progress)")
    p.add_argument("--no-overlap", action="store_true", help="one blocking allreduce after backward")
    p.add_argument("--message-mib", type=float, default=default("run.message_mib"))
    p.add_argument("--activation", default=default("model.activation"))
    p.add_argument("--optimizer", default="sgd", help="update rule timed with the step (default sgd)")
    p.add_argument("--json", action="store_true", help="print only the JSON object")
    ranks(p)

    p = sub.add_parser("scale", help="scaling study: run the job at several process counts")
    p.add_argument("job", type=Path)
    p.add_argument("--ranks", type=str, default="1,2", help="process counts, e.g. 1,2,4")
    p.add_argument("--mode", choices=("strong", "weak"), default="strong")
    p.add_argument("--steps", type=_positive, default=20)
    p.add_argument("--threads", type=_positive, default=1)
    p.add_argument("--pin", action="store_true", help="pin rank r to core r")
    p.add_argument("--network", default=None, help="project to this network, e.g. 100Gb/s,2us")
    p.add_argument("--project", default="8,16,64,256,1024", help="process counts to project to")
    p.add_argument("--out", type=Path, default=Path("scaling"))
    p.add_argument("--timeout", type=float, default=900.0, help="seconds allowed per process count (default 900)")
    p.add_argument("--no-progress", action="store_true", help="no progress bar")

    p = sub.add_parser("predict", help="outputs of a trained model on new inputs")
    p.add_argument("checkpoint", type=Path, help="checkpoint directory, workdir, or final.npz")
    p.add_argument("inputs", type=Path)
    p.add_argument("--out", type=Path, required=True)
    p.add_argument("--targets", type=Path, default=None, help="labelled set: also print metrics")

    sub.add_parser("info", help="versions, BLAS, MPI, cores and the Numba cache")

    p = sub.add_parser("compile", help="compile the kernels a job uses into the Numba cache (before a batch job "
                                       "starts its ranks); needs no data")
    p.add_argument("job", type=Path)

    p = sub.add_parser("demo", help="generate the pump-fault data set, train on several ranks, verify")
    p.add_argument("--out", type=Path, default=Path("shardmill-demo"))
    p.add_argument("--ranks", type=_positive, default=None, help="processes (default: cores, at most 4)")
    p.add_argument("--rows", type=_positive, default=12000)
    p.add_argument("--epochs", type=_positive, default=8)
    return parser


def main(argv: list[str] | None = None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    args = build_parser().parse_args(argv)
    if args.command in ("train", "verify", "bench") and args.ranks and not os.environ.get(LAUNCHED):
        return relaunch(args.ranks, strip_ranks(argv))
    from shardmill.parallel.comm import run_guarded

    return run_guarded(lambda: dispatch(args), user_errors=(JobError,))


def dispatch(args: argparse.Namespace) -> int:
    if args.command == "train":
        return cmd_train(args)
    if args.command == "verify":
        from shardmill.verify import cmd_verify

        return cmd_verify(args)
    if args.command == "bench":
        return cmd_bench(args)
    if args.command == "scale":
        from shardmill.scaling.driver import cmd_scale

        return cmd_scale(args)
    if args.command == "predict":
        from shardmill.predict import cmd_predict

        return cmd_predict(args)
    if args.command == "compile":
        return cmd_compile(args)
    if args.command == "info":
        from shardmill.info import cmd_info

        return cmd_info()
    if args.command == "demo":
        from shardmill.demo import cmd_demo

        return cmd_demo(args)
    raise AssertionError(args.command)


def cmd_train(args: argparse.Namespace) -> int:
    from shardmill.config import load_job
    from shardmill.parallel.comm import Comm
    from shardmill.trainer import TrainingStopped, train

    job = load_job(args.job)
    comm = Comm()
    try:
        result = train(job, comm, resume=args.resume, progress=not args.no_progress, echo=True, fresh=args.fresh)
    except TrainingStopped as stopped:
        if comm.rank == 0:
            print(f"shardmill: {stopped}", file=sys.stderr, flush=True)
        return stopped.exit_code
    if comm.rank == 0:
        print(f"done: {result['steps']} steps on {comm.size} process(es); final parameters in "
              f"{Path(result['workdir']) / 'final.npz'}")
    return 0


def cmd_compile(args: argparse.Namespace) -> int:
    """Compile what the job's step runs (its dtype, activations, loss, optimizer, exchange) on made-up rows."""
    from shardmill.bench import synthetic_dataset
    from shardmill.config import load_job
    from shardmill.info import numba_cache_dir
    from shardmill.parallel.comm import Comm
    from shardmill.trainer import Trainer, warm_up_kernels

    job = load_job(args.job)
    comm = Comm()
    m = job.model
    dataset = synthetic_dataset(m.layers, m.loss, max(4 * job.run.global_batch, 64), m.dtype)
    seconds = warm_up_kernels(Trainer(job, comm, dataset=dataset))
    if comm.rank == 0:
        print(f"kernels for {m.dtype}, {', '.join(m.activation) or 'no hidden layer'}, {m.loss}, "
              f"{job.optimizer.method}, {job.run.reduction} mode ready in {seconds:.1f} s "
              f"(Numba cache: {numba_cache_dir()})")
    return 0


def cmd_bench(args: argparse.Namespace) -> int:
    from shardmill.bench import run_bench
    from shardmill.config import check_choice
    from shardmill.parallel.comm import Comm

    check_choice("model.activation", args.activation, name="--activation")
    check_choice("optimizer.method", args.optimizer, name="--optimizer")
    if args.message_mib <= 0:
        raise JobError(f"`--message-mib` must be > 0; got {args.message_mib}")
    comm = Comm()
    result = run_bench(args.layers, args.batch, dtype=args.dtype, threads=args.threads, steps=args.steps,
                       warmup=args.warmup, reduction=args.reduction, overlap=not args.no_overlap,
                       activation=args.activation, method=args.optimizer, message_mib=args.message_mib,
                       exact_chunk=args.exact_chunk, update=args.update, exact_format=args.exact_format,
                       progress=args.progress,
                       comm=comm)
    if comm.rank == 0:
        if not args.json:
            print(f"{result['samples_per_s']:,.0f} samples/s, {result['step_ms']:.2f} ms/step, "
                  f"{result['ratio_to_floor']:.3f} of the BLAS floor", file=sys.stderr)
        print(json.dumps(result))
    return 0
