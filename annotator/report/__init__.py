"""A self-contained HTML report of an annotated output: ``annotator report DIR --to FILE``.

:func:`build_report` reads ``DIR/manifest.json`` for every stated number, DuckDB aggregates
over the full columns for the histograms and counts, and a seeded random sample of rows for
the scatter plots; figures are PNG images drawn with matplotlib's Agg renderer and embedded
in the page, so the file opens anywhere without a network.

matplotlib is imported only when a report is built (the ``report`` extra).
"""

from .build import DEFAULT_SAMPLE_ROWS, DEFAULT_SEED, ReportResult, build_report

__all__ = ["build_report", "ReportResult", "DEFAULT_SAMPLE_ROWS", "DEFAULT_SEED"]
