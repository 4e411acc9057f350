"""``annotator run INPUT... --out DIR``."""

from __future__ import annotations

import os
import shlex
import signal
import sys
import threading
import time
from pathlib import Path

from ..config import load_job
from ..errors import ConfigError, OutputError, UserError
from ..plan import build_plan, describe_plan
from ..runner import ENGINES, run_plan


def add_arguments(p) -> None:
    p.add_argument("inputs", nargs="*", metavar="INPUT",
                   help="catalogue files or folders (default: [input].paths of the job file)")
    p.add_argument("--out", metavar="DIR", help="output folder (default: [output].dir)")
    p.add_argument("--config", metavar="JOB.toml", help="job file")
    p.add_argument("--cosmology", metavar="PRESET",
                   help="cosmology preset (planck2018, planck2015, wmap9, textbook)")
    p.add_argument("--chunk-rows", type=int, metavar="N", help="rows per batch and part file")
    p.add_argument("--overwrite", action="store_true", help="replace an earlier output in DIR")
    p.add_argument("--resume", action="store_true",
                   help="continue an interrupted run of the same job in DIR")
    p.add_argument("--dry-run", action="store_true",
                   help="print the plan without reading any rows")
    p.add_argument("--engine", choices=ENGINES, default="local",
                   help="local: this process, reading, annotating and writing in three threads "
                        "(default); dask: one task per chunk on a Dask cluster (--scheduler, "
                        "--workers; see docs/dask.md)")
    p.add_argument("--scheduler", metavar="ADDRESS", help="Dask scheduler address (dask engine)")
    p.add_argument("--workers", type=int, metavar="N",
                   help="dask engine: worker processes of the local cluster it starts; with "
                        "--scheduler, wait until N workers have joined")
    p.add_argument("--quiet", action="store_true", help="no progress output")


def _terminal_columns(stream) -> int:
    """Columns of the terminal ``stream`` is on; 0 when not a terminal or of no width."""
    try:
        if not stream.isatty():
            return 0
        return os.get_terminal_size(stream.fileno()).columns
    except (OSError, ValueError, AttributeError):
        return 0


def _eta_text(p) -> str:
    if p.eta_s is not None:
        return f"{p.eta_s:.0f} s"
    return "estimating" if p.fraction is not None else "unknown"


class _Reporter:
    """A progress bar on a terminal; a plain log line every few seconds otherwise.

    The bar shows the percentage of the inputs read (bytes of the files on disk, so CSV.gz
    runs have one too), rows, rows/s and a smoothed ETA. A terminal of zero columns (some
    pseudo-terminals of CI systems and batch schedulers) gets the log lines: a bar there
    would print nothing for the whole run.
    """

    INTERVAL_S = 5.0

    def __init__(self, total: int | None, quiet: bool):
        self.quiet = quiet
        self.total = total
        self.use_bar = not quiet and _terminal_columns(sys.stderr) > 0
        self.bar = None
        self.last: float | None = None

    def _postfix(self, p) -> str:
        return (f"{p.rows_done:,} rows, {p.parts_done} parts, {p.rows_per_second:,.0f} rows/s, "
                f"ETA {_eta_text(p)}")

    def __call__(self, p) -> None:
        if self.quiet:
            return
        if self.use_bar:
            from tqdm import tqdm

            if self.bar is None:
                self.bar = tqdm(total=1000 if p.fraction is not None else None,
                                bar_format="annotating {percentage:3.0f}%|{bar}| {postfix}"
                                if p.fraction is not None else "annotating {postfix}",
                                dynamic_ncols=True, file=sys.stderr)
            if p.fraction is not None:
                self.bar.n = int(round(p.fraction * 1000))
            self.bar.set_postfix_str(self._postfix(p), refresh=False)
            self.bar.refresh()
            return
        now = time.monotonic()
        if self.last is None or now - self.last >= self.INTERVAL_S:  # the first at once
            self.last = now
            pct = f" ({100 * p.fraction:.0f} %)" if p.fraction is not None else ""
            print(f"annotator: {p.rows_done} rows{pct}, {p.parts_done} parts, "
                  f"{p.rows_per_second:,.0f} rows/s, ETA {_eta_text(p)}", file=sys.stderr,
                  flush=True)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()
            self.bar = None


def resume_command(args) -> str:
    """The command that continues this run: as typed, without --overwrite, with --resume."""
    argv = list(getattr(args, "_argv", None) or sys.argv[1:])
    kept = [a for a in argv if a not in ("--overwrite", "--dry-run", "--resume")]
    return shlex.join(["annotator", *kept, "--resume"])


class _Interruptions:
    """Ctrl-C (SIGINT) and SIGTERM alike: the first one finishes the part in progress, commits
    it and stops; a second one abandons the part in progress at once (``--resume`` redoes it).
    Installed only around the run, in the main thread; the previous handlers come back after.
    """

    SIGNALS = (signal.SIGINT, signal.SIGTERM)

    def __init__(self):
        self.event = threading.Event()
        self.received: str | None = None
        self.previous = {}

    def _handle(self, signum, frame) -> None:
        name = signal.Signals(signum).name
        if self.event.is_set():
            raise KeyboardInterrupt(name)
        self.received = name
        self.event.set()
        print(f"annotator: {name} received: finishing the part in progress, then stopping "
              f"(send it again to stop at once)", file=sys.stderr, flush=True)

    def __enter__(self):
        if threading.current_thread() is threading.main_thread():
            for s in self.SIGNALS:
                self.previous[s] = signal.signal(s, self._handle)
        return self

    def __exit__(self, *exc) -> None:
        for s, handler in self.previous.items():
            signal.signal(s, handler)

    @property
    def exit_code(self) -> int:
        return 128 + int(getattr(signal, self.received or "SIGINT"))


def _stopped_message(args, out, how: str) -> str:
    from ..io.checkpoint import CheckpointLog

    records = CheckpointLog(Path(out)).records()
    rows = sum(r["rows_read"] for r in records)
    return (f"annotator: {how}; {len(records)} parts ({rows} rows) are committed in {out}. "
            f"Continue with: {resume_command(args)}")


def _check_engine_options(args) -> None:
    """--scheduler and --workers belong to the dask engine: refused with any other."""
    if args.engine != "dask":
        given = [o for o, v in (("--scheduler", args.scheduler), ("--workers", args.workers))
                 if v is not None]
        if given:
            raise ConfigError(f"{given[0]}: only used with --engine dask (this run uses the "
                              f"{args.engine} engine); add --engine dask or drop {given[0]}")


def main(args) -> int:
    _check_engine_options(args)
    job = load_job(
        args.config,
        inputs=args.inputs or None,
        output_dir=args.out,
        cosmology_preset=args.cosmology,
        chunk_rows=args.chunk_rows,
        overwrite=args.overwrite,
    )
    if job.output_dir is not None and not (args.resume or job.overwrite or args.dry_run):
        from ..engines.common import interrupted_run

        stopped = interrupted_run(job.output_dir, job.fingerprint())
        if stopped is not None and stopped[0]:
            raise OutputError(f"output {job.output_dir}: holds an interrupted run of this job "
                              f"({stopped[1]} parts committed); continue it with: "
                              f"{resume_command(args)}  (or start again with --overwrite)")
    plan = build_plan(job)
    if not args.config or not job.columns:
        for logical, (col, how) in plan.column_mapping.items():
            if how == "detected":
                print(f"annotator: input {logical!r} <- column {col!r} (detected; set [columns] "
                      f"{logical} = \"...\" to choose another)", file=sys.stderr)
    if job.cosmology_is_default:
        print(f"annotator: cosmology {job.cosmology['preset']} (the default; choose with "
              f"--cosmology or [cosmology])", file=sys.stderr)
    for name, why in plan.skipped:
        print(f"annotator: {name} not applied: {why}", file=sys.stderr)
    if args.dry_run:
        print(describe_plan(plan))
        return 0
    if job.output_dir is None:
        raise ConfigError("--out: no output folder given (or set [output].dir in the job file)")
    engine_options = {}
    if args.engine == "dask":
        engine_options = {"scheduler": args.scheduler, "workers": args.workers}
    reporter = _Reporter(plan.estimated_rows, args.quiet)
    with _Interruptions() as stops:
        try:
            manifest = run_plan(plan, engine=args.engine, progress=reporter,
                                resume=args.resume, cancel=stops.event,
                                engine_options=engine_options)
        except KeyboardInterrupt as exc:
            reporter.close()
            second = exc.args[0] if exc.args else "SIGINT"
            how = f"{second} received while stopping" if stops.received else "interrupted"
            print(_stopped_message(args, job.output_dir, f"{how}: the part in progress was "
                                   f"abandoned"), file=sys.stderr)
            return stops.exit_code
        except UserError:
            if not stops.event.is_set():
                raise
            reporter.close()
            print(_stopped_message(args, job.output_dir, f"stopped by {stops.received} after "
                                   f"finishing the part in progress"), file=sys.stderr)
            return stops.exit_code
        finally:
            reporter.close()
    print(f"annotator: read {manifest['rows_read']} rows, wrote {manifest['rows_written']}, "
          f"set aside {manifest['rows_rejected']} (flagged {manifest['rows_flagged']}) in "
          f"{manifest['elapsed_s']:.1f} s", file=sys.stderr)
    print(job.output_dir)
    return 0
