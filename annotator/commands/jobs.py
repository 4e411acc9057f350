"""``annotator jobs --server URL [--json] [ID]``: what a running service is doing."""

from __future__ import annotations

import json

from .submit import add_server_arguments


def add_arguments(p) -> None:
    p.add_argument("job_id", nargs="?", metavar="ID", help="show one job in detail")
    add_server_arguments(p)
    p.add_argument("--phase", default=None,
                   help="only jobs in this phase (PENDING, QUEUED, EXECUTING, COMPLETED, "
                        "ERROR, ABORTED, ARCHIVED)")
    p.add_argument("--limit", type=int, default=None, metavar="N",
                   help="only the N most recent jobs")
    p.add_argument("--json", action="store_true",
                   help="print JSON (a list of jobs; one object with ID)")


def _rate(job: dict) -> str:
    r = job.get("rows_per_second")
    return f"{r:,.0f}/s" if r else "-"


def _eta(job: dict) -> str:
    eta = job.get("eta_s")
    if eta is None or job["phase"] != "EXECUTING":
        return "-"
    if eta >= 3600:
        return f"{eta / 3600:.1f} h"
    return f"{eta / 60:.1f} min" if eta >= 60 else f"{eta:.0f} s"


def _rows(job: dict) -> str:
    total = job.get("rows_total")
    return f"{job['rows_done']}/{total}" if total is not None else str(job["rows_done"])


def format_table(jobs: list[dict]) -> str:
    header = ("ID", "PHASE", "ROWS", "RATE", "ETA", "NAME", "OUTPUT / ERROR")
    lines = [header]
    for j in jobs:
        where = j.get("error") if j["phase"] == "ERROR" else j.get("output")
        lines.append((j["id"], j["phase"], _rows(j), _rate(j), _eta(j), j.get("name") or "-",
                      (where or "-").replace("\n", " ")))
    widths = [max(len(row[i]) for row in lines) for i in range(len(header) - 1)]
    return "\n".join("  ".join(cell.ljust(w) for cell, w in zip(row, widths)) + "  " + row[-1]
                     for row in lines)


def format_job(job: dict) -> str:
    out = [f"{job['id']}  {job['phase']}  {job.get('name') or ''}".rstrip()]
    parts = f"{job['parts_done']} part{'s' if job['parts_done'] != 1 else ''}"
    out.append(f"  rows      {_rows(job)} ({parts}), {_rate(job)}, "
               f"ETA {_eta(job)}")
    out.append(f"  output    {job['output']}")
    if job.get("manifest_path"):
        out.append(f"  manifest  {job['manifest_path']}")
    if job.get("error"):
        out.append(f"  error     {job['error']}")
    for note in job.get("notes", []):
        out.append(f"  note      {note}")
    for event in job.get("history", []):
        out.append(f"  {event['at']}  {event['phase']:<9}  {event['message']}")
    return "\n".join(out)


def main(args) -> int:
    from ..service.client import ServiceClient

    with ServiceClient(args.server, args.token) as client:
        if args.job_id:
            job = client.job(args.job_id)
            print(json.dumps(job, indent=2) if args.json else format_job(job))
            return 0
        jobs = client.jobs(phase=args.phase.upper() if args.phase else None, limit=args.limit)
    if args.json:
        print(json.dumps(jobs, indent=2))
    elif jobs:
        print(format_table(jobs))
    else:
        print("no jobs")
    return 0
