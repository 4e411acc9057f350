"""``GET /metrics``: the service's figures in the OpenMetrics 1.0 text format.

OpenMetrics (the CNCF specification "OpenMetrics 1.0", 2020) is the open standard a scraper
reads: one ``# TYPE``/``# HELP``/``# UNIT`` block per metric family, ``_total`` samples of a
counter, ``_bucket{le=...}``/``_count``/``_sum`` of a histogram with a ``+Inf`` bucket, and a
final ``# EOF`` line. Counters are kept in the ledger (they never decrease, even when jobs
are deleted or archived, and survive restarts).
"""

from __future__ import annotations

import time

from .ledger import PHASES, QUEUED, Ledger

CONTENT_TYPE = "application/openmetrics-text; version=1.0.0; charset=utf-8"
#: upper bounds (seconds) of the job-duration histogram's buckets
DURATION_BUCKETS = (1, 5, 15, 60, 300, 900, 3600, 4 * 3600, 12 * 3600, 86400)
PREFIX = "annotator"

#: every family: (name, type, unit, help) - the reference docs/operations.md lists
FAMILIES = (
    ("jobs", "gauge", "", "Jobs in the ledger, by UWS phase."),
    ("queue_length", "gauge", "", "Jobs waiting to start (QUEUED)."),
    ("queue_oldest_age_seconds", "gauge", "seconds",
     "Age of the oldest QUEUED job (0 when the queue is empty)."),
    ("workers", "gauge", "", "Worker processes the service may run at once."),
    ("workers_busy", "gauge", "", "Worker processes running a job now."),
    ("rows_read", "counter", "", "Catalogue rows read by completed jobs."),
    ("rows_written", "counter", "", "Rows written to outputs by completed jobs."),
    ("rows_rejected", "counter", "", "Rows set aside with a reason by completed jobs."),
    ("worker_crashes", "counter", "", "Worker processes that ended without reporting."),
    ("jobs_archived", "counter", "", "Finished jobs whose folder retention removed."),
    ("job_duration_seconds", "histogram", "seconds",
     "Time from a job's first start to its end, by final phase."),
    ("uptime_seconds", "gauge", "seconds", "Seconds since the service started."),
)


def _number(v: float) -> str:
    if isinstance(v, int) or float(v).is_integer():
        return str(int(v))
    return repr(float(v))


def _labels(**labels: str) -> str:
    if not labels:
        return ""
    inner = ",".join(f'{k}="{_escape(str(v))}"' for k, v in labels.items())
    return "{" + inner + "}"


def _escape(text: str) -> str:
    return text.replace("\\", "\\\\").replace("\n", "\\n").replace('"', '\\"')


def render(ledger: Ledger, *, workers: int, busy: int, started_at: float,
           now: float | None = None) -> str:
    """The OpenMetrics text of the service right now."""
    now = time.time() if now is None else now
    counts = ledger.counts()
    totals = ledger.totals()
    oldest = ledger.oldest_queued_at()
    durations = ledger.durations()
    samples: dict[str, list[str]] = {name: [] for name, *_ in FAMILIES}

    def add(family: str, value, suffix: str = "", **labels) -> None:
        samples[family].append(f"{PREFIX}_{family}{suffix}{_labels(**labels)} {_number(value)}")

    for phase in PHASES:
        add("jobs", counts.get(phase, 0), phase=phase)
    add("queue_length", counts.get(QUEUED, 0))
    add("queue_oldest_age_seconds", max(now - oldest, 0.0) if oldest else 0)
    add("workers", workers)
    add("workers_busy", busy)
    for name in ("rows_read", "rows_written", "rows_rejected", "worker_crashes",
                 "jobs_archived"):
        add(name, totals[name], "_total")
    by_phase: dict[str, list[float]] = {}
    for phase, seconds in durations:
        by_phase.setdefault(phase, []).append(seconds)
    for phase in sorted(by_phase):
        values = by_phase[phase]
        for bound in DURATION_BUCKETS:
            add("job_duration_seconds", sum(1 for v in values if v <= bound), "_bucket",
                phase=phase, le=f"{float(bound)}")
        add("job_duration_seconds", len(values), "_bucket", phase=phase, le="+Inf")
        add("job_duration_seconds", len(values), "_count", phase=phase)
        add("job_duration_seconds", sum(values), "_sum", phase=phase)
    add("uptime_seconds", max(now - started_at, 0.0))

    lines: list[str] = []
    for name, kind, unit, text in FAMILIES:
        full = f"{PREFIX}_{name}"
        lines.append(f"# TYPE {full} {kind}")
        if unit:
            lines.append(f"# UNIT {full} {unit}")
        lines.append(f"# HELP {full} {text}")
        lines.extend(samples[name])
    lines.append("# EOF")
    return "\n".join(lines) + "\n"


__all__ = ["render", "CONTENT_TYPE", "FAMILIES", "DURATION_BUCKETS"]
