"""The batch service: jobs submitted over HTTP, run in worker processes, resumed after crashes.

* :mod:`.app` - the HTTP JSON API (FastAPI), validation of submitted jobs;
* :mod:`.ledger` - the job ledger (SQLite, WAL) with the IVOA UWS phases;
* :mod:`.workers` - the scheduler and the worker processes (one per job);
* :mod:`.security` - data roots, loopback binding, the bearer token;
* :mod:`.client` - the client the ``submit``, ``jobs`` and ``abort`` commands use;
* :mod:`.front` - the connection-level defences (head timeout, JSON answers to what h11
  refuses, no connection-count limit);
* :mod:`.web` - the status page (``GET /``, job pages, sign-in, CSRF-guarded forms) with its
  ``templates/`` and ``static/``; :mod:`.metrics` - ``GET /metrics`` (OpenMetrics);
* :mod:`.privacy` - file modes (umask, ``--group``); :mod:`.housekeeping` - retention
  (ARCHIVED) and the disk guard.

Nothing here is imported by the rest of the package; FastAPI, uvicorn and httpx are the
``service`` extra.
"""
