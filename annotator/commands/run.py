"""``annotator run INPUT... --out DIR``."""

from __future__ import annotations

import sys
import time

from ..config import load_job
from ..errors import ConfigError
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
    p.add_argument("--engine", choices=ENGINES, default="local")
    p.add_argument("--scheduler", metavar="ADDRESS", help="Dask scheduler address (dask engine)")
    p.add_argument("--workers", type=int, metavar="N",
                   help="dask engine: worker processes of the local cluster it starts; with "
                        "--scheduler, wait until N workers have joined")
    p.add_argument("--quiet", action="store_true", help="no progress output")


class _Reporter:
    """A progress bar on a terminal; a plain log line every few seconds otherwise."""

    def __init__(self, total: int | None, quiet: bool):
        self.quiet = quiet
        self.tty = sys.stderr.isatty()
        self.bar = None
        self.last = 0.0
        if not quiet and self.tty:
            from tqdm import tqdm

            self.bar = tqdm(total=total, unit="rows", unit_scale=True, dynamic_ncols=True,
                            file=sys.stderr, desc="annotating")

    def __call__(self, p) -> None:
        if self.quiet:
            return
        if self.bar is not None:
            self.bar.update(p.rows_done - self.bar.n)
            return
        now = time.monotonic()
        if now - self.last >= 5.0:
            self.last = now
            eta = f"{p.eta_s:.0f} s" if p.eta_s is not None else "unknown"
            print(f"annotator: {p.rows_done} rows, {p.parts_done} parts, "
                  f"{p.rows_per_second:,.0f} rows/s, ETA {eta}", file=sys.stderr, flush=True)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()


def main(args) -> int:
    job = load_job(
        args.config,
        inputs=args.inputs or None,
        output_dir=args.out,
        cosmology_preset=args.cosmology,
        chunk_rows=args.chunk_rows,
        overwrite=args.overwrite,
    )
    plan = build_plan(job)
    if not args.config or not job.columns:
        for logical, (col, how) in plan.column_mapping.items():
            if how == "detected":
                print(f"annotator: input {logical!r} <- column {col!r} (detected; set [columns] "
                      f"{logical} = \"...\" to choose another)", file=sys.stderr)
    if job.cosmology_is_default:
        print(f"annotator: cosmology {job.cosmology['preset']} (the default; choose with "
              f"--cosmology or [cosmology])", file=sys.stderr)
    if args.dry_run:
        print(describe_plan(plan))
        return 0
    if job.output_dir is None:
        raise ConfigError("--out: no output folder given (or set [output].dir in the job file)")
    engine_options = {}
    if args.engine == "dask":
        engine_options = {"scheduler": args.scheduler, "workers": args.workers}
    reporter = _Reporter(plan.estimated_rows, args.quiet)
    try:
        manifest = run_plan(plan, engine=args.engine, progress=reporter, resume=args.resume,
                            engine_options=engine_options)
    finally:
        reporter.close()
    print(f"annotator: read {manifest['rows_read']} rows, wrote {manifest['rows_written']}, "
          f"set aside {manifest['rows_rejected']} (flagged {manifest['rows_flagged']}) in "
          f"{manifest['elapsed_s']:.1f} s", file=sys.stderr)
    print(job.output_dir)
    return 0
