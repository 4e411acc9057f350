"""``annotator submit JOB.toml --server URL``: hand a job file to a running service."""

from __future__ import annotations

import sys


def add_server_arguments(p) -> None:
    """--server and --token, shared by submit, jobs and abort."""
    from ..service.client import DEFAULT_SERVER, SERVER_ENV, TOKEN_ENV

    p.add_argument("--server", default=None, metavar="URL",
                   help=f"the service (default: ${SERVER_ENV}, else {DEFAULT_SERVER})")
    p.add_argument("--token", default=None,
                   help=f"bearer token, when the service needs one (default: ${TOKEN_ENV})")


def add_arguments(p) -> None:
    p.add_argument("job_file", metavar="JOB.toml",
                   help="job file, as for `annotator run --config` (TOML, or its JSON form)")
    add_server_arguments(p)
    p.add_argument("--name", default=None, help="label shown by `annotator jobs` "
                                                "(default: the job file's name)")
    p.add_argument("--wait", action="store_true",
                   help="wait until the job ends; exit 0 only if it COMPLETED")
    p.add_argument("--wait-timeout", type=float, default=None, metavar="S",
                   help="with --wait: give up after S seconds")


def main(args) -> int:
    from ..service.client import ServiceClient

    with ServiceClient(args.server, args.token) as client:
        job = client.submit_file(args.job_file, name=args.name)
        for note in job.get("notes", []):
            print(f"annotator: note: {note}", file=sys.stderr)
        plan = job.get("plan") or {}
        rows = plan.get("estimated_rows")
        print(f"annotator: {job['id']} {job['phase']}: {len(plan.get('inputs', []))} input "
              f"file(s){f', {rows} rows' if rows is not None else ''}; output {job['output']}",
              file=sys.stderr)
        if args.wait:
            final = client.wait(job["id"], timeout_s=args.wait_timeout)
            if final["phase"] != "COMPLETED":
                reason = final.get("error") or final["phase"]
                print(f"annotator: {final['id']} {final['phase']}: {reason}", file=sys.stderr)
                print(job["id"])
                return 1
            print(f"annotator: {final['id']} COMPLETED: {final['rows_done']} rows in "
                  f"{final['output']}", file=sys.stderr)
    print(job["id"], flush=True)
    return 0
