"""One entry point for running a job, shared by the CLI, the service and the tests."""

from __future__ import annotations

from .config import Job
from .plan import Plan, build_plan

ENGINES = ("local", "dask")


def run_plan(plan: Plan, *, engine: str = "local", progress=None, resume: bool = False,
             cancel=None, engine_options: dict | None = None) -> dict:
    """Execute a plan with the chosen engine; return the manifest."""
    if engine == "local":
        from .engines.local import run_local

        return run_local(plan, progress=progress, resume=resume, cancel=cancel)
    if engine == "dask":
        from .engines.dask import run_dask

        return run_dask(plan, progress=progress, resume=resume, cancel=cancel,
                        **(engine_options or {}))
    from .errors import ConfigError

    raise ConfigError(f"--engine: {engine!r} is not one of {', '.join(ENGINES)}")


def run_job(job: Job, *, pm=None, **kwargs) -> dict:
    """Plan and run a job; see :func:`run_plan` for the options."""
    return run_plan(build_plan(job, pm), **kwargs)
