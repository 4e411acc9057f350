"""``annotator delete ID --server URL``: forget a finished job and remove its folder."""

from __future__ import annotations

from .submit import add_server_arguments


def add_arguments(p) -> None:
    p.add_argument("job_id", metavar="ID", help="a COMPLETED, ERROR, ABORTED or ARCHIVED job")
    add_server_arguments(p)


def main(args) -> int:
    from ..service.client import ServiceClient

    with ServiceClient(args.server, args.token) as client:
        answer = client.delete(args.job_id)
    where = answer["folder"] if answer.get("folder_removed") else "no folder removed"
    print(f"{answer['id']} deleted ({where})")
    return 0
