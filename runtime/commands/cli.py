"""The ``shardmill`` command: train, verify, bench, scale, variants, predict, export, curves, expand, saves, info,
compile, demo.

User errors (a bad job, a missing file, a refused checkpoint) print one line and exit 2, with no
traceback; our own bugs print the rank and a full traceback and end every rank.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
from pathlib import Path

from shardmill.config import choices, default
from shardmill.errors import JobError
from shardmill.parallel.launch import LAUNCHED, ignore_late_signals, relaunch, strip_ranks


def _layers(text: str) -> list[int]:
    try:
        layers = [int(x) for x in text.split(",")]
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be comma-separated integers like 784,1024,10; got {text!r}") from None
    if len(layers) < 2 or min(layers) < 1:
        raise argparse.ArgumentTypeError(f"must be at least two positive integers; got {text!r}")
    return layers


def _integer(low: int, what: str):
    """An argparse type: an integer ≥ ``low``, refused as "must be WHAT; got 'TEXT'"."""

    def parse(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            value = low - 1
        if value < low:
            raise argparse.ArgumentTypeError(f"must be {what}; got {text!r}")
        return value

    return parse


_count = _integer(0, "an integer ≥ 0")
_positive = _integer(1, "a positive integer")


class _Help(argparse.HelpFormatter):
    """Help lines that end with the option's default (when it has one worth showing); choices show in the metavar."""

    def _get_help_string(self, action: argparse.Action) -> str:
        text = action.help or ""
        shown = action.default not in (None, False, [], argparse.SUPPRESS) and action.option_strings
        if shown and "%(default)" not in text and "default" not in text:
            text += " (default: %(default)s)"
        return text


# One grammar for every command (README, "Flags"): JOB is a job file; --set changes one of its keys; --ranks N starts
# N processes; --sizes lists process counts; --json prints JSON on stdout; --out FILE writes a file; --out-dir DIR
# writes into a folder.
def build_parser() -> argparse.ArgumentParser:
    from shardmill.version import __version__

    parser = argparse.ArgumentParser(prog="shardmill", description="Data-parallel MLP training on CPUs over MPI.",
                                     formatter_class=_Help)
    parser.add_argument("--version", action="version", version=f"shardmill {__version__}",
                        help="print the version and exit")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    def command(name: str, text: str) -> argparse.ArgumentParser:
        return sub.add_parser(name, help=text, description=text, formatter_class=_Help)

    def job_file(p: argparse.ArgumentParser) -> None:
        p.add_argument("job", type=Path, metavar="JOB", help="the job file (TOML)")
        p.add_argument("--set", action="append", default=[], metavar="SECTION.KEY=VALUE", dest="sets",
                       help="change one key of the job (repeatable), e.g. --set optimizer.learning_rate=0.01; "
                            "the value is read as TOML, or as text when it is not TOML")

    def ranks(p: argparse.ArgumentParser) -> None:
        p.add_argument("--ranks", type=_positive, default=None, metavar="N",
                       help="start N processes with the bundled mpiexec (default: run as launched, e.g. under your "
                            "own mpiexec or srun)")

    def json_switch(p: argparse.ArgumentParser, what: str, form: str = "one JSON object") -> None:
        p.add_argument("--json", action="store_true", help=f"print {what} as {form} on stdout, no text")

    p = command("train", "train a job")
    job_file(p)
    again = p.add_mutually_exclusive_group()
    again.add_argument("--resume", action="store_true",
                       help="continue from the newest complete checkpoint in the workdir")
    again.add_argument("--continue", action="store_true", dest="continue_run",
                       help="resume when the workdir holds a checkpoint, else start anew (clearing an earlier "
                            "attempt's leftovers): one command line for a batch job's first submission and its "
                            "resubmissions or requeues")
    again.add_argument("--fresh", action="store_true",
                       help="start over in a workdir that holds a run: remove its checkpoints, metrics.jsonl, "
                            "final.npz and best.npz first")
    p.add_argument("--no-progress", action="store_true", help="no progress bar")
    p.add_argument("--curves", action="store_true", help="draw the run's curves into WORKDIR/curves at the end")
    ranks(p)

    p = command("verify", "compare the parallel gradient with the serial one on the job's batches")
    job_file(p)
    p.add_argument("--batches", type=_positive, default=3, metavar="N", help="global batches to compare")
    p.add_argument("--trajectory", type=_count, default=0, metavar="N",
                   help="also train N steps serial and parallel and report the weight divergence per step")
    p.add_argument("--out", type=Path, default=None, metavar="FILE", help="also write the JSON report to FILE")
    json_switch(p, "the report")
    ranks(p)

    p = command("bench", "time training steps of a made-up data set against the BLAS floor")
    p.add_argument("--layers", type=_layers, default=[784, 1024, 1024, 10], metavar="W0,W1,…",
                   help="layer widths, inputs first (default: 784,1024,1024,10)")
    p.add_argument("--global-batch", type=_positive, default=512, metavar="G", help="samples per step, all ranks")
    p.add_argument("--dtype", choices=choices("model.dtype"), default=default("model.dtype"),
                   help="parameter and arithmetic type")
    p.add_argument("--threads", type=_positive, default=default("run.threads"), metavar="N",
                   help="BLAS threads per process")
    p.add_argument("--steps", type=_positive, default=30, metavar="N", help="timed steps")
    p.add_argument("--untimed", type=_count, default=5, metavar="N",
                   help="steps run before timing starts (kernels compiled, caches warm)")
    p.add_argument("--reduction", choices=choices("run.reduction"), default=default("run.reduction"),
                   help="gradient sum, as the job key run.reduction")
    p.add_argument("--update", choices=choices("run.update"), default=default("run.update"),
                   help="as the job key run.update: replicated, every rank updates everything; sharded, each rank "
                        "its own slice")
    p.add_argument("--exact-chunk", type=_positive, default=64, metavar="N",
                   help=f"rows per fixed chunk in exact mode (run.exact_chunk, whose default is "
                        f"{default('run.exact_chunk')}; 64 here divides bench's global batches)")
    p.add_argument("--exact-format", choices=choices("run.exact_format"), default=default("run.exact_format"),
                   help="exact mode's accumulator (run.exact_format)")
    p.add_argument("--comm-driver", choices=choices("run.comm_driver"), default=default("run.comm_driver"),
                   help="who drives the overlapped reductions (the job key run.comm_driver)")
    p.add_argument("--no-overlap", action="store_true", help="one blocking allreduce after backward")
    p.add_argument("--message-mib", type=float, default=default("run.message_mib"), metavar="MIB",
                   help="smallest gradient message, MiB (run.message_mib)")
    p.add_argument("--activation", default=default("model.activation"), metavar="NAME",
                   help=f"hidden activation, one of {', '.join(choices('model.activation'))}")
    p.add_argument("--norm", choices=choices("model.norm"), default=default("model.norm"),
                   help="normalisation of the hidden layers (model.norm)")
    p.add_argument("--dropout", type=float, default=default("model.dropout"), metavar="P",
                   help="dropout rate of every hidden layer in training, in [0, 1) (model.dropout)")
    p.add_argument("--residual", action="store_true", help="skip connections around equal-width hidden layers "
                   "(model.residual)")
    p.add_argument("--method", default="sgd", metavar="NAME",
                   help=f"the update rule timed with each step, one of {', '.join(choices('optimizer.method'))}; "
                        f"default sgd, the cheapest, so the step is mostly the network (a job's own default, "
                        f"{default('optimizer.method')}, adds its update's memory passes)")
    json_switch(p, "the result")
    ranks(p)

    p = command("scale", "scaling study: run the job at several process counts, fit a cost model, project")
    job_file(p)
    p.add_argument("--sizes", type=str, default="1,2", metavar="P1,P2,…",
                   help="process counts to run, e.g. 1,2,4 (must include 1)")
    p.add_argument("--mode", choices=("strong", "weak"), default="strong",
                   help="strong: the job's global batch at every count; weak: global batch × P")
    p.add_argument("--steps", type=_positive, default=20, metavar="N", help="timed steps per process count")
    p.add_argument("--threads", type=_positive, default=1, metavar="N", help="BLAS threads per process")
    p.add_argument("--pin", action="store_true", help="pin rank r to core r")
    p.add_argument("--layouts", default=None, metavar="PxT,…",
                   help="instead of the process counts: compare these ranks × threads layouts, e.g. 1x2,2x1")
    p.add_argument("--network", default=None, metavar="BW,LAT",
                   help="project to this network, e.g. 100Gb/s,2us (default: the measured one)")
    p.add_argument("--project-nodes", default=None, metavar="N1,N2,…",
                   help="with --layouts: node counts to project every layout to (default 1,2,4,16,64)")
    p.add_argument("--project", default="8,16,64,256,1024", metavar="P1,P2,…", help="process counts to project to")
    p.add_argument("--out-dir", type=Path, default=Path("scaling"), metavar="DIR",
                   help="folder for scaling.json, scaling.csv, the plots and logs")
    p.add_argument("--timeout", type=float, default=900.0, metavar="SECONDS", help="time allowed per process count")
    p.add_argument("--no-progress", action="store_true", help="no progress bar")

    p = command("variants", "train many variants of a job in one launch, g ranks each, and rank them in one table")
    job_file(p)
    p.add_argument("plan", type=Path, metavar="PLAN", help="the plan of variants (TOML: [study], [grid], [[variant]])")
    p.add_argument("--group-ranks", type=_count, default=0, metavar="G",
                   help="ranks that train one variant together (default: the plan's study.ranks_per_variant, else "
                        "chosen: the most groups the variants can fill)")
    p.add_argument("--out-dir", type=Path, default=None, metavar="DIR",
                   help="the study folder (default: the plan's study.folder, beside the plan)")
    p.add_argument("--scaling", type=Path, default=None, metavar="DIR",
                   help="a `shardmill scale` study of this job (its folder or scaling.json): g becomes the largest "
                        "measured process count whose efficiency stays at or above 0.8, unless given")
    ranks(p)

    p = command("predict", "outputs (or labels) of a trained model on new inputs")
    p.add_argument("model", type=Path, metavar="MODEL",
                   help="final.npz, best.npz, a checkpoint directory or a workdir (its newest checkpoint)")
    p.add_argument("inputs", type=Path, metavar="INPUTS", help="rows to predict: .npy, .npz, .csv or .parquet")
    p.add_argument("--out", type=Path, required=True, metavar="FILE",
                   help="where the outputs go: .npy or .csv, by extension")
    p.add_argument("--labels", action="store_true",
                   help="write labels (class index, or 0/1 per output) instead of the output layer's values")
    p.add_argument("--targets", type=Path, default=None, metavar="FILE", help="labelled set: also print metrics")
    p.add_argument("--keep", action="append", default=None, metavar="COLUMN[,COLUMN…]",
                   help="columns of the INPUTS table (an id, text allowed) written first into a .csv --out, in the "
                        "order given; repeatable")

    p = command("export", "write a trained model as ONNX, with a model card (JSON)")
    p.add_argument("model", type=Path, metavar="MODEL",
                   help="final.npz, best.npz, a checkpoint directory or a workdir (its newest checkpoint)")
    p.add_argument("--out", type=Path, required=True, metavar="FILE", help="the .onnx file to write")
    p.add_argument("--card", type=Path, default=None, metavar="FILE",
                   help="the model card to write (default: FILE with .card.json in place of .onnx)")
    p.add_argument("--opset", default="17", metavar="N",
                   help="ONNX operator set version (checked with the other values: one line when it is not one)")

    p = command("curves", "draw a run's metrics.jsonl as PNG figures")
    p.add_argument("source", type=Path, metavar="RUN", help="a workdir or its metrics.jsonl")
    p.add_argument("--out-dir", type=Path, default=None, metavar="DIR",
                   help="folder for the PNGs (default: RUN/curves)")

    p = command("expand", "check a job (its keys and a first look at its data) and print it with every default "
                          "filled in (TOML)")
    job_file(p)
    json_switch(p, "the job")

    p = command("saves", "list a workdir's checkpoints: step, epoch, time, losses, size, checksum verified")
    p.add_argument("workdir", type=Path, metavar="WORKDIR", help="the run's workdir (or its checkpoints folder)")
    json_switch(p, "the list", "a JSON array (one object per checkpoint or model file)")

    p = command("info", "versions, BLAS, MPI, cores and the Numba cache")
    json_switch(p, "the facts")

    p = command("compile", "compile the kernels a job uses into the Numba cache (before a batch job starts its "
                           "ranks); needs no data")
    job_file(p)

    p = command("demo", "generate the pump-fault data set, train on several ranks, verify")
    p.add_argument("--out-dir", type=Path, default=Path("shardmill-demo"), metavar="DIR", help="folder for it all")
    p.add_argument("--ranks", type=_positive, default=None, metavar="N", help="processes (default: cores, at most 4)")
    p.add_argument("--rows", type=_positive, default=12000, metavar="N", help="rows to generate")
    p.add_argument("--epochs", type=_positive, default=8, metavar="N", help="passes over the training rows")
    return parser


def main(argv: list[str] | None = None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    args = build_parser().parse_args(argv)
    if args.command in ("train", "verify", "bench", "variants") and args.ranks and not os.environ.get(LAUNCHED):
        status = relaunch(args.ranks, strip_ranks(argv))
        ignore_late_signals()  # the job is over: a late signal must not turn its status into "killed"
        return status
    if args.command == "train":  # a stop signal while the rank starts up stops it after its first step
        from shardmill.training.signals import note_early_signals

        note_early_signals()
    from shardmill.parallel.comm import run_guarded

    return run_guarded(lambda: dispatch(args), user_errors=(JobError,))


def read_job(args: argparse.Namespace):
    """The job of a command: its JOB file with the --set assignments applied."""
    from shardmill.config import load_job

    return load_job(args.job, overrides=args.sets)


def dispatch(args: argparse.Namespace) -> int:
    if args.command == "train":
        return cmd_train(args)
    if args.command == "verify":
        from shardmill.training.verify import cmd_verify

        return cmd_verify(args, read_job(args))
    if args.command == "bench":
        return cmd_bench(args)
    if args.command == "scale":
        from shardmill.scaling.driver import cmd_scale

        return cmd_scale(args, read_job(args))
    if args.command == "variants":
        from shardmill.study.run import cmd_variants

        return cmd_variants(args)
    if args.command == "predict":
        from shardmill.commands.predict import cmd_predict

        return cmd_predict(args)
    if args.command == "export":
        try:
            from shardmill.commands.export import cmd_export
        except ImportError as missing:
            raise JobError(f"`shardmill export` needs the onnx package ({missing}); install it with "
                           f"pip install \"shardmill[onnx]\"") from None

        return cmd_export(args)
    if args.command == "curves":
        from shardmill.commands.curves import cmd_curves

        return cmd_curves(args)
    if args.command == "expand":
        return cmd_expand(args)
    if args.command == "saves":
        from shardmill.commands.saves import cmd_saves

        return cmd_saves(args)
    if args.command == "compile":
        return cmd_compile(args)
    if args.command == "info":
        from shardmill.commands.info import cmd_info

        return cmd_info(args.json)
    if args.command == "demo":
        from shardmill.commands.demo import cmd_demo

        return cmd_demo(args)
    raise AssertionError(args.command)


def cmd_expand(args: argparse.Namespace) -> int:
    """``shardmill expand JOB``: the job checked (keys and a first look at the data, ``commands/expand.py``), printed
    with every key (TOML whose comments say what of the data was checked, or JSON with --json)."""
    from shardmill.commands.expand import check_data
    from shardmill.jobtext import job_toml

    job = read_job(args)
    checked = check_data(job)
    if args.json:
        print(json.dumps({"job": job.as_dict(), "job_digest": job.digest(), "overrides": list(job.overrides),
                          "workdir": str(job.workdir), "data_checked": checked}, indent=1))
    else:
        print("".join(f"# data: {line}\n" for line in checked) + job_toml(job), end="")
    return 0


def cmd_train(args: argparse.Namespace) -> int:
    from shardmill.parallel.comm import Comm
    from shardmill.training.loop import train
    from shardmill.training.signals import TrainingStopped

    job = read_job(args)
    comm = Comm()
    try:
        resume = "auto" if args.continue_run else args.resume
        result = train(job, comm, resume=resume, progress=not args.no_progress, echo=True, fresh=args.fresh)
    except TrainingStopped as stopped:
        if comm.rank == 0:
            ranks = comm.size if os.environ.get(LAUNCHED) else None  # started by --ranks: say it again
            print(f"shardmill: {stopped.message(str(args.job), ranks)}", file=sys.stderr, flush=True)
        return stopped.exit_code
    if comm.rank == 0:
        workdir = Path(result["workdir"])
        print(f"done: {result['steps']} steps on {comm.size} process(es); final parameters in "
              f"{workdir / 'final.npz'}" + (f", the best ({result['best']['metric']} = {result['best']['value']:.6g}, "
                                            f"epoch {result['best']['epoch']}) in {workdir / 'best.npz'}"
                                            if result["best"] and result["best"]["value"] is not None else ""))
        if args.curves:
            from shardmill.commands.curves import draw_curves

            for path in draw_curves(workdir, workdir / "curves"):
                print(f"wrote {path}")
    return 0


def cmd_compile(args: argparse.Namespace) -> int:
    """Compile what the job's step runs (its dtype, activations, loss, optimizer, exchange) on made-up rows."""
    from shardmill.commands.bench import synthetic_dataset
    from shardmill.machine import numba_cache_dir
    from shardmill.parallel.comm import Comm
    from shardmill.training.trainer import Trainer
    from shardmill.training.warmup import warm_up_kernels

    job = read_job(args)
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
    from shardmill.commands.bench import run_bench
    from shardmill.config import check_choice
    from shardmill.parallel.comm import Comm

    check_choice("model.activation", args.activation, name="--activation")
    check_choice("optimizer.method", args.method, name="--method")

    if not args.message_mib > 0:
        raise JobError(f"`--message-mib` must be > 0; got {args.message_mib}")
    comm = Comm()
    result = run_bench(args.layers, args.global_batch, dtype=args.dtype, threads=args.threads, steps=args.steps,
                       warmup=args.untimed, reduction=args.reduction, overlap=not args.no_overlap,
                       activation=args.activation, method=args.method, message_mib=args.message_mib,
                       exact_chunk=args.exact_chunk, update=args.update, exact_format=args.exact_format,
                       comm_driver=args.comm_driver, norm=args.norm, dropout=args.dropout, residual=args.residual,
                       comm=comm)
    if comm.rank == 0:
        if args.json:
            print(json.dumps(result))
        else:
            phases = ", ".join(f"{name} {ms:.3f}" for name, ms in result["phase_ms"].items())
            print(f"{result['samples_per_s']:,.0f} samples/s, {result['step_ms']:.3f} ms/step (median), "
                  f"{result['ratio_to_floor']:.3f} of the BLAS floor ({result['floor_ms']:.3f} ms) on "
                  f"{result['processes']} process(es); mean step {result['step_ms_mean']:.3f} ms = phases (ms): "
                  f"{phases}")
    return 0
