"""Command line: parse, call one library function, print.

Torch is imported only inside the commands that train (`run`, `demo`,
`worker`), so `--help`, `check`, `fit` and `report` start fast.
"""
from __future__ import annotations

import argparse
import logging
import sys
from pathlib import Path
from typing import Callable, Sequence

from . import __version__
from .errors import ConfigError, DepthplanError, RunFailed

log = logging.getLogger("depthplan")

DEMO_CONFIG = Path(__file__).resolve().parent.parent / "configs" / "demo.yaml"


class _Parser(argparse.ArgumentParser):
    """argparse that reports a usage mistake as one line and exit status 2."""

    def error(self, message: str) -> None:  # type: ignore[override]
        raise ConfigError(f"{message} (see {self.prog} --help)")


def _cmd_check(args: argparse.Namespace) -> int:
    from .config import load_config
    from .forked import available_cores
    from .sweep.guards import check_memory, plan_size
    from .sweep.run import output_folder, plan_cells
    from .train.datasets import load_dataset

    from .sweep.sizes import check_against_data, size_lines

    cfg = load_config(args.config)
    data = load_dataset(cfg.data)
    if cfg.model.family_name != "mlp":    # builds the network (imports torch): a bad factory fails here
        from .sweep.run import check_sweep_model
        check_sweep_model(cfg)
    check_against_data(cfg, len(data.y_train), data.n_classes)
    cells = plan_cells(cfg)
    check_memory(cfg, cells)
    size = plan_size(cfg, cells, available_cores())
    print(f"{args.config}: ok")
    print(f"  data     {data.description} ({len(data.y_train)} training, {len(data.y_val)} validation rows)")
    print(f"  model    {cfg.model.family_name}" + (f" ({cfg.model.options_text()})" if cfg.model.options_text() else ""))
    print(f"  depths   {', '.join(map(str, cfg.sweep.depths))}; seeds {len(cfg.sweep.seeds)}; "
          f"learning rates {', '.join(f'{lr:g}' for lr in cfg.train.learning_rate)}")
    print(f"  cells    {len(cells)} ({sum(len(c.seeds) for c in cells)} seed runs, "
          f"at most {cfg.train.max_updates} updates each)")
    print(f"  size     {size.text()}" + ("; `run` asks for --yes" if size.large else ""))
    for line in size_lines(cfg):
        print(f"  {line}")
    print(f"  output   {output_folder(cfg, args.out)}")
    return 0


def _print_depth_table(results: list) -> None:
    """Runs per depth and their median T, one block per learning-rate curve (the rules of fit.json)."""
    import statistics

    from .fitting.depthlaw import summarize_depths
    from .records import group_runs

    curves = group_runs(results)
    print(f"{'lr':>8} {'mode':>6} {'depth':>5} {'runs':>4} {'conv':>4} {'cens':>4} {'div':>4} {'median T':>10}")
    for (mode, _), runs in curves.items():
        for row in summarize_depths(runs):
            lr = statistics.median(r.learning_rate for r in runs if r.depth == row["depth"])
            med = f"{row['median']:>10.0f}" if row["median"] is not None else f"{'> budget':>10}"
            print(f"{lr:>8.3g} {mode:>6} {row['depth']:>5} {row['runs']:>4} {row['converged']:>4} "
                  f"{row['censored']:>4} {row['diverged']:>4} {med}")


def _train_sweep(config: Path, args: argparse.Namespace) -> Path:
    from .config import load_config
    from .sweep.run import run_sweep
    from .sweep.storage import STORAGE_ENV
    from .urls import redact

    from .forked import available_cores
    from .sweep.guards import check_memory, confirm_size, plan_size
    from .sweep.run import plan_cells

    cfg = load_config(config)
    cells = plan_cells(cfg)
    check_memory(cfg, cells)
    confirm_size(plan_size(cfg, cells, args.workers or available_cores()), args.yes)
    summary = run_sweep(cfg, out=args.out, workers=args.workers, storage=args.storage,
                        over_sample=getattr(args, "over_sample", False),
                        show_progress=not args.quiet, plan_only=getattr(args, "plan_only", False))
    if getattr(args, "plan_only", False):
        print(f"{cfg.name}: cells planned in {redact(summary_url(cfg, args))}; start workers with "
              f"`depthplan worker --study {cfg.name}` (storage from --storage or ${STORAGE_ENV}), "
              f"then run this command again without --plan-only to collect the results")
        return summary.folder
    from .fitting.inputs import load_runs

    results = load_runs(summary.folder)
    print(f"{cfg.name}: {summary.n_runs} seed runs stored in {summary.folder} "
          f"({summary.n_trained} cells trained now, {summary.wall_seconds:.0f} s)")
    for i, r in enumerate(summary.rounds, 1):
        print(f"  round {i}: {r['reason']}")
    if summary.tuned_rates:
        print("  tuned learning rates: " + ", ".join(f"K={k}: {lr:.3g}" for k, lr in sorted(summary.tuned_rates.items())))
    for note in summary.notes:
        print(f"  note: {note}")
    from .fitting.inputs import read_sweep_info
    from .sweep.sizes import prediction_lines

    for line in prediction_lines(read_sweep_info(summary.folder).get("verify")):
        print(f"  {line}")
    _print_size_tables(results)
    _fail_on_failed_cells(summary.failed, f"{summary.n_cells} cells", "run the same command again to retry them")
    return summary.folder


def _print_size_tables(results: list) -> None:
    """The depth table, one per proxy size when the runs span several (sweep.widths, sweep.train_rows)."""
    from .fitting.transfer import size_of

    sizes = sorted({size_of(r) for r in results})
    if len(sizes) < 2:
        _print_depth_table(results)
        return
    for w, n in sizes:
        print(f"  proxy width {w}" + (f", {n} training rows" if n else ""))
        _print_depth_table([r for r in results if size_of(r) == (w, n)])


def _fail_on_failed_cells(failed: list, of: str, retry: str) -> None:
    """List the cells whose training raised, then fail the command (exit status 1) if there are any."""
    if not failed:
        return
    print(f"  {len(failed)} of {of} failed:")
    for cell in failed:
        print(f"    {cell}")
    raise RunFailed(f"{len(failed)} of {of} failed (listed above, tracebacks in the log and the store); "
                    f"fix the cause and {retry}")


def summary_url(cfg: object, args: argparse.Namespace) -> str:
    from .sweep.run import output_folder
    from .sweep.storage import resolve_url

    return resolve_url(args.storage, cfg.output.storage, output_folder(cfg, args.out))  # type: ignore[attr-defined]


def print_plan(fit: dict | None, folder: Path) -> None:
    """The depth to plan for, its basis and range (the first lines `depthplan fit` prints)."""
    from .errors import DataError
    from .fitting import fit_path
    from .fitting.summary import headline_lines

    if fit is None:
        try:
            fit, written = fit_path(folder)
        except DataError as exc:
            print(f"No depth to plan for yet: {exc}")
            return
        print(f"fit written to {written}")
    print("\n".join(headline_lines(fit)))


def _cmd_run(args: argparse.Namespace) -> int:
    folder = _train_sweep(Path(args.config), args)
    if not getattr(args, "plan_only", False):
        print_plan(None, folder)
    return 0


def _size(text: str) -> int:
    """A proxy or target size: a whole number >= 1 (argparse type)."""
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a whole number >= 1, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be a whole number >= 1, got {text!r}")
    return value


def _cmd_fit(args: argparse.Namespace) -> int:
    from .fitting import fit_path, format_summary

    target = {"width": args.target_width, "train_rows": args.target_rows}
    fit, written = fit_path(Path(args.path), Path(args.json) if args.json else None,
                            save_fraction=args.save_fraction, n_boot=args.bootstrap, cost=args.cost,
                            target=target if any(target.values()) else None)
    print(format_summary(fit))
    print(f"fit written to {written}")
    return 0


def _cmd_report(args: argparse.Namespace) -> int:
    from .reporting.write import write_report

    paths = write_report(Path(args.path), Path(args.out) if args.out else None)
    print(f"report written to {paths['html']}")
    return 0


def _cmd_demo(args: argparse.Namespace) -> int:
    config = DEMO_CONFIG
    if not config.is_file():
        raise ConfigError(f"the demo sweep {config} is missing; run from a checkout of depthplan")
    from .reporting.write import write_report

    import json

    from .config import load_config
    from .sweep.run import output_folder
    from .sweep.sample import keep_unchanged, restore_reproduced_runs, snapshot

    target = output_folder(load_config(config), args.out)
    sample = snapshot(target) if (target / "runs.csv").is_file() else {}
    if sample and not (target / "store.db").exists():
        # a fresh checkout: the committed sample ships without its store, so the demo trains it again
        print(f"{target} holds the committed demo results without their store; training the demo again")
        args.over_sample = True
    folder = _train_sweep(config, args)
    reproduced = restore_reproduced_runs(folder, sample)
    paths = write_report(folder, None)
    if sample:
        kept = keep_unchanged(folder, sample)
        print(f"the runs {'reproduce' if reproduced else 'differ from'} the ones {folder} held"
              + (" (apart from their timings)" if reproduced else "")
              + (f"; {len(kept)} files that changed only in dates, paths or provenance notes keep their bytes" if kept else ""))
    print(f"demo report: {paths['html']}")
    print_plan(json.loads(Path(paths["fit"]).read_text(encoding="utf-8")), folder)
    return 0


def _cmd_worker(args: argparse.Namespace) -> int:
    import os

    import torch

    from .config import config_from_dict
    from .sweep.run import check_worker_data, failed_cells, work
    from .sweep.storage import STORAGE_ENV, SweepStore

    url = args.storage or os.environ.get(STORAGE_ENV)
    if not url:
        raise ConfigError(f"worker: pass --storage URL or set {STORAGE_ENV}")
    torch.set_num_threads(1)
    store = SweepStore(url, args.study)
    cfg = config_from_dict(store.meta()["config"])
    check_worker_data(store, cfg)
    n = work(store, cfg, linger_s=args.linger)
    print(f"worker: {n} cells trained and stored in sweep '{args.study}'")
    _fail_on_failed_cells(failed_cells(store), f"the cells of sweep '{args.study}'",
                          "run `depthplan run` on the sweep again (with --plan-only for workers) to retry them")
    return 0


_LOG_FLAGS = ((("-v", "--verbose"), "log what each step does"),
              (("-q", "--quiet"), "no progress bar, warnings only"),
              (("--debug",), "show the full traceback of an error"))


def _add_log_flags(parser: argparse.ArgumentParser, *, suppress: bool) -> None:
    """-v / -q / --debug, accepted before or after the subcommand (suppressed there, so a flag
    given before it is not reset by the subcommand's default)."""
    for names, help_ in _LOG_FLAGS:
        extra = {"default": argparse.SUPPRESS} if suppress else {}
        parser.add_argument(*names, action="store_true", help=help_, **extra)


def build_parser() -> argparse.ArgumentParser:
    from .sweep.guards import MAX_SEED_RUNS

    common = argparse.ArgumentParser(add_help=False)
    _add_log_flags(common, suppress=True)
    p = _Parser(prog="depthplan", description="Measure how depth changes updates-to-convergence on small "
                "CPU networks, fit the depth scaling law, and plan the depth of a big training run.")
    p.add_argument("--version", action="version", version=f"depthplan {__version__}")
    _add_log_flags(p, suppress=False)
    sub = p.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    def add(name: str, fn: Callable[[argparse.Namespace], int], help_: str) -> argparse.ArgumentParser:
        sp = sub.add_parser(name, help=help_, description=help_, parents=[common])
        sp.set_defaults(func=fn)
        return sp

    def train_opts(sp: argparse.ArgumentParser) -> None:
        sp.add_argument("--out", metavar="DIR", help="results folder (default: output.dir, else results/<name> "
                        "beside the sweep file)")
        sp.add_argument("--workers", type=int, default=None, metavar="N",
                        help="local worker processes, one thread each (default: one per available core)")
        sp.add_argument("--yes", action="store_true",
                        help=f"start a large plan (over {MAX_SEED_RUNS:,} seed runs or an estimated hour) without asking")
        sp.add_argument("--storage", metavar="URL", help="Optuna storage URL (default: $DEPTHPLAN_STORAGE, "
                        "else a SQLite file in the results folder)")

    sp = add("check", _cmd_check, "check a sweep file and its data without training")
    sp.add_argument("config", metavar="CONFIG")
    sp.add_argument("--out", metavar="DIR", help="results folder the run would use")
    sp = add("run", _cmd_run, "train the sweep (resumes: only missing cells are trained)")
    sp.add_argument("config", metavar="CONFIG")
    train_opts(sp)
    sp.add_argument("--plan-only", action="store_true",
                    help="enqueue the cells for `depthplan worker` processes and stop")
    sp = add("fit", _cmd_fit, "fit the depth scaling law to a results folder or a measurements CSV")
    sp.add_argument("path", metavar="PATH")
    sp.add_argument("--json", metavar="FILE", help="where to write fit.json")
    sp.add_argument("--save-fraction", type=float, default=0.05, metavar="F",
                    help="a layer is worth adding while it saves at least this fraction of updates (default 0.05)")
    sp.add_argument("--bootstrap", type=int, default=400, metavar="N", help="bootstrap resamples (default 400)")
    sp.add_argument("--target-width", type=_size, metavar="W",
                    help="hidden width of the job to plan for (needs runs at two or more proxy widths)")
    sp.add_argument("--target-rows", type=_size, metavar="N",
                    help="training rows of the job to plan for (needs runs at two or more proxy row counts)")
    # the values of depthplan.fitting.cost.COST_BASES (kept literal so that --help imports no scipy)
    sp.add_argument("--cost", choices=("flops", "seconds"), default="flops",
                    help="cost of one update for the compute-optimal depth: the FLOP count of the "
                         "network as built (default; a table without the network's shape uses its "
                         "seconds_per_update column), or this machine's measured seconds per update")
    sp = add("report", _cmd_report, "write the hand-over report (Markdown + self-contained HTML)")
    sp.add_argument("path", metavar="PATH")
    sp.add_argument("--out", metavar="DIR", help="report folder (default: PATH's folder)")
    sp = add("demo", _cmd_demo, "train, fit and report the built-in demo sweep")
    train_opts(sp)
    sp = add("worker", _cmd_worker, "claim and train cells of a sweep planned in a shared store")
    sp.add_argument("--storage", metavar="URL", help="storage URL (default: $DEPTHPLAN_STORAGE)")
    sp.add_argument("--study", required=True, metavar="NAME", help="the sweep's name")
    sp.add_argument("--linger", type=float, default=0.0, metavar="S",
                    help="when idle, wait this many seconds for newly planned cells before stopping (default 0)")
    return p


def _without_secrets(message: str, argv: Sequence[str] | None) -> str:
    """An error message with the passwords of the storage URLs given (--storage, $DEPTHPLAN_STORAGE) scrubbed."""
    import itertools
    import os

    from .sweep.storage import STORAGE_ENV
    from .urls import scrub

    args = list(sys.argv[1:] if argv is None else argv)
    urls = [os.environ.get(STORAGE_ENV)]
    urls += [a.split("=", 1)[1] for a in args if a.startswith("--storage=")]
    urls += [b for a, b in itertools.pairwise(args) if a == "--storage"]
    return scrub(message, *urls)


def os_error_line(exc: OSError) -> str:
    """One line for an operating-system failure: the path, what happened, and what to do."""
    import errno

    where = f"{exc.filename}: " if exc.filename else ""
    what = exc.strerror or type(exc).__name__
    todo = {errno.ENOSPC: "free some disk space and run the same command again (what is stored is kept)",
            errno.EDQUOT: "free some of your disk quota and run the same command again (what is stored is kept)",
            errno.EACCES: "make the folder writable for you, or pass --out DIR",
            errno.EPERM: "make the folder writable for you, or pass --out DIR",
            errno.EROFS: "pass --out DIR on a writable disk",
            errno.ENOMEM: "close other programs or lower model.width / sweep.seeds_per_cell"}
    return f"{where}{what}; {todo.get(exc.errno, 'check the path and run the same command again')}"


def store_failure_line(exc: BaseException) -> str:
    """One line for a failure inside the sweep store's database layer that no command caught."""
    from .errors import first_line

    text = first_line(str(exc)) or type(exc).__name__
    return (f"the sweep store failed: {text}; check that its disk has space and its folder is writable "
            "(pass --debug for the full traceback), then run the same command again")


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; return the exit status."""
    parser = build_parser()
    debug = "--debug" in (sys.argv[1:] if argv is None else argv)
    try:
        args = parser.parse_args(argv)
        level = logging.INFO if args.verbose else logging.WARNING
        logging.basicConfig(level=level, format="%(levelname)s %(name)s: %(message)s")
        if not args.command:
            parser.print_help()
            return 2
        return args.func(args)
    except DepthplanError as exc:
        if debug:
            raise
        print(f"depthplan: {_without_secrets(str(exc), argv)}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        if debug:
            raise
        print("depthplan: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:  # output piped into `head` and the like
        import os

        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0
    except OSError as exc:
        if debug:
            raise
        print(f"depthplan: {_without_secrets(os_error_line(exc), argv)}", file=sys.stderr)
        return 1
    except Exception as exc:
        from .sweep.storage import is_db_failure

        if debug or not is_db_failure(exc):
            raise
        print(f"depthplan: {_without_secrets(store_failure_line(exc), argv)}", file=sys.stderr)
        return 1
