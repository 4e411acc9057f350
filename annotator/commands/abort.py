"""``annotator abort ID --server URL``: stop a queued or executing job (to ABORTED)."""

from __future__ import annotations

from .submit import add_server_arguments


def add_arguments(p) -> None:
    p.add_argument("job_id", metavar="ID", help="the job, as `annotator submit` printed it")
    add_server_arguments(p)


def main(args) -> int:
    from ..service.client import ServiceClient

    with ServiceClient(args.server, args.token) as client:
        job = client.abort(args.job_id)
    print(f"{job['id']} {job['phase']}")
    return 0
