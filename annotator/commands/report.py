"""``annotator report DIR --to REPORT.html``."""

from __future__ import annotations

import sys


def add_arguments(p) -> None:
    from ..report import DEFAULT_SAMPLE_ROWS, DEFAULT_SEED

    p.add_argument("output", metavar="DIR", help="an annotated output folder (with manifest.json)")
    p.add_argument("--to", metavar="REPORT.html", required=True,
                   help="the HTML file to write (.html or .htm); an existing file needs "
                        "--overwrite")
    p.add_argument("--overwrite", action="store_true", help="replace an existing --to file")
    p.add_argument("--sample-rows", type=int, metavar="N", default=DEFAULT_SAMPLE_ROWS,
                   help=f"rows drawn at random for the scatter plots (default "
                        f"{DEFAULT_SAMPLE_ROWS}); counts and histograms always use every row")
    p.add_argument("--seed", type=int, metavar="S", default=DEFAULT_SEED,
                   help=f"seed of the sample (default {DEFAULT_SEED})")


HTML_SUFFIXES = (".html", ".htm")


def main(args) -> int:
    from pathlib import Path

    from ..errors import ConfigError, OutputError
    from ..report import build_report

    target = Path(args.to)
    if target.suffix.lower() not in HTML_SUFFIXES:
        raise ConfigError(f"--to {args.to}: the report is an HTML page; name it .html "
                          f"(print it to PDF from a browser if you need one)")
    if target.exists() and not args.overwrite:
        raise OutputError(f"--to {args.to}: exists (add --overwrite to replace it)")

    result = build_report(args.output, args.to, sample_rows=args.sample_rows, seed=args.seed)
    print(f"annotator: report of {result.rows:,} rows ({result.sampled:,} sampled, "
          f"{len(result.figures)} figures) in {result.seconds:.1f} s", file=sys.stderr)
    print(result.path)
    return 0
