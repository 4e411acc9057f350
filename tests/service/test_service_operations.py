"""What the service does for the people who run it: file modes, retention, the disk guard,
per-job reports and the metrics, on a real ``annotator serve``.

Outside references named beside the checks: POSIX (IEEE Std 1003.1-2017) for the permission
bits and umask; the IVOA UWS 1.1 Recommendation (2016, section 2.1.3) for the ARCHIVED phase;
the OpenMetrics 1.0 specification (2020), through the parser of the ``prometheus_client``
library (an outside implementation, tests only), for the metrics text.
"""

from __future__ import annotations

import grp
import os
import stat
from pathlib import Path

import httpx
import pyarrow.parquet as pq
import pytest
from catalogue_factory import make_catalogue
from service_harness import Service, job_toml, wait_until

from annotator.service.housekeeping import DiskGuard, Retention
from annotator.service.ledger import ARCHIVED, COMPLETED, Ledger

TOKEN = "ops-token-" + "k" * 24
ROWS = 3_000


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    root = tmp_path_factory.mktemp("ops-data")
    pq.write_table(make_catalogue(ROWS, seed=21), root / "quillfield.parquet")
    return root


def modes_under(root: Path) -> dict[Path, int]:
    out = {}
    for folder, dirs, files in os.walk(root):
        for name in [*dirs, *files]:
            p = Path(folder) / name
            if not p.is_symlink():
                out[p] = p.lstat().st_mode
    out[root] = root.lstat().st_mode
    return out


def run_one(service: Service, data: Path, name: str = "quillfield-night") -> dict:
    r = service.submit(job_toml(str(data / "quillfield.parquet")), name=name)
    assert r.status_code == 201, r.text
    return service.wait_phase(r.json()["id"], ("COMPLETED", "ERROR", "ABORTED"), 90)


# -- private by default, or readable by a group ------------------------------------------

def test_a_completed_job_gets_a_private_report_and_everything_else_is_private(data, tmp_path):
    root = tmp_path / "root"
    root.mkdir(mode=0o755)  # an operator's pre-made, world-readable root is tightened
    service = Service(root, [data], token=TOKEN).start()
    try:
        job = run_one(service, data)
        assert job["phase"] == COMPLETED, job
        # the report is built after the job completes, and listed in the job object
        done = wait_until(lambda: (lambda j: j if j["report"] else None)(
            service.job(job["id"])), 120, "the report")
        assert done["report"] == f"/jobs/{job['id']}/report" and done["report_error"] is None
        assert Path(done["report_path"]) == Path(job["output"]).parent / "report.html"
        with service.client() as c:
            r = c.get(done["report"])
        assert r.status_code == 200 and r.headers["content-type"].startswith("text/html")
        assert "Annotation report" in r.text and f'data-value="{ROWS}"' in r.text
    finally:
        service.stop()
    modes = modes_under(root)
    kinds = {p.name for p in modes}
    # the ledger, the submitted job file, output parts, manifest, log and report are there
    assert {"ledger.sqlite", "submitted.toml", "manifest.json", "worker.log",
            "report.html"} <= kinds, kinds
    assert any(p.suffix == ".parquet" for p in modes)
    for path, mode in modes.items():
        # POSIX: no permission bit for the group or for others
        assert stat.S_IMODE(mode) & 0o077 == 0, f"{path}: {stat.S_IMODE(mode):04o}"
        want = 0o700 if stat.S_ISDIR(mode) else 0o600
        assert stat.S_IMODE(mode) == want, f"{path}: {stat.S_IMODE(mode):04o}"


def _a_group() -> grp.struct_group:
    """A group this user may give files to, other than its own when it can (root can use
    any)."""
    mine = os.getegid()
    choices = [g for g in grp.getgrall()
               if os.geteuid() == 0 or g.gr_gid in os.getgroups()]
    others = [g for g in choices if g.gr_gid != mine]
    return (others or [grp.getgrgid(mine)])[0]


def test_with_group_its_members_may_read_and_nobody_else(data, tmp_path):
    group = _a_group()
    root = tmp_path / "root"
    service = Service(root, [data], token=TOKEN,
                      extra=("--group", group.gr_name, "--no-reports")).start()
    try:
        job = run_one(service, data)
        assert job["phase"] == COMPLETED, job
    finally:
        service.stop()
    for path, mode in modes_under(root).items():
        bits = stat.S_IMODE(mode)
        assert path.lstat().st_gid == group.gr_gid, f"{path}: group {path.lstat().st_gid}"
        if stat.S_ISDIR(mode):
            assert bits == 0o2750, f"{path}: {bits:04o}"  # set-group-id: new files inherit
        else:
            assert bits == 0o640, f"{path}: {bits:04o}"


def test_an_unknown_group_is_refused_in_one_line(data, tmp_path):
    import subprocess
    import sys

    r = subprocess.run([sys.executable, "-m", "annotator", "serve", "--root",
                        str(tmp_path / "r"), "--data-root", str(data), "--port", "0",
                        "--group", "no-such-group-quillfield"],
                       capture_output=True, text=True, timeout=60)
    assert r.returncode == 2 and "--group no-such-group-quillfield: no such group" in r.stderr
    assert "Traceback" not in r.stderr


# -- per-job report, metrics, retention ----------------------------------------------------

@pytest.fixture(scope="module")
def kept(data, tmp_path_factory):
    """A service that keeps the folders of the two most recently finished jobs."""
    service = Service(tmp_path_factory.mktemp("kept") / "root", [data], token=TOKEN,
                      extra=("--keep-count", "2", "--no-reports")).start()
    yield service
    service.kill()


def test_retention_archives_the_oldest_finished_jobs(kept, data):
    first = run_one(kept, data, "night-1")
    assert first["phase"] == COMPLETED
    folder = Path(first["output"]).parent
    assert folder.is_dir()

    second = run_one(kept, data, "night-2")
    third = run_one(kept, data, "night-3")
    assert second["phase"] == third["phase"] == COMPLETED
    # the oldest finished job is archived (after its report), the two newest kept
    archived = wait_until(lambda: (lambda j: j if j["phase"] == ARCHIVED else None)(
        kept.job(first["id"])), 60, "the oldest job to be archived")
    assert not folder.exists()
    assert any("archived" in e["message"] and "more than 2 finished" in e["message"]
               for e in archived["history"])
    for j in (second, third):
        assert Path(j["output"]).is_dir() and kept.job(j["id"])["phase"] == COMPLETED
    with kept.client() as c:
        r = c.get(f"/jobs/{first['id']}/report")
        assert r.status_code == 404 and "no report" in r.json()["error"]
        assert c.delete(f"/jobs/{first['id']}").status_code == 200  # ARCHIVED can be deleted


def test_retention_never_touches_active_jobs(tmp_path):
    """In the ledger alone: an executing and a queued job, both older than the limit."""
    ledger = Ledger(tmp_path)
    jobs = tmp_path / "jobs"
    made = []
    for i in range(3):
        rec = ledger.create(name=f"j{i}", job={}, base_dir="/", notes=[], jobs_dir=jobs)
        Path(rec.folder).mkdir(parents=True)
        ledger.queue(rec.id)
        made.append(rec)
    executing = ledger.claim_next()
    finished = ledger.claim_next()
    ledger.fail(finished.id, "broken")
    swept = Retention(jobs, keep_days=0.0, keep_count=0).sweep(ledger, now=4e9)
    assert swept == [finished.id]
    assert ledger.get(finished.id).phase == ARCHIVED and not Path(finished.folder).exists()
    assert ledger.get(executing.id).phase == "EXECUTING" and Path(executing.folder).is_dir()
    assert ledger.get(made[2].id).phase == "QUEUED" and Path(made[2].folder).is_dir()
    assert ledger.totals()["jobs_archived"] == 1


class _FakeDisk(DiskGuard):
    def __init__(self, free, total, **kw):
        super().__init__(Path("/"), **kw)
        self.free, self.total = free, total

    def usage(self):
        from collections import namedtuple

        return namedtuple("usage", "total used free")(self.total, self.total - self.free,
                                                      self.free)


def test_the_disk_guard_starts_waits_or_fails_with_the_reason():
    guard = _FakeDisk(free=1_000_000_000, total=4_000_000_000, fraction=0.8, wait_s=60)
    assert guard.verdict(700_000_000, 0)[0] == "start"          # 0.7 GB <= 0.8 x 1 GB
    verdict, reason = guard.verdict(900_000_000, 5)             # 0.9 GB > 0.8 GB
    assert verdict == "wait" and "waiting for disk space" in reason and "900.0 MB" in reason
    verdict, reason = guard.verdict(900_000_000, 61)
    assert verdict == "fail" and "waited 61 s" in reason
    verdict, reason = guard.verdict(5_000_000_000, 0)           # over 0.8 x the whole disk
    assert verdict == "fail" and "would not fit even in the empty disk" in reason
    assert guard.verdict(None, 0)[0] == "start"                  # no estimate: no guard


def test_a_job_too_big_for_the_disk_is_not_started_and_says_why(data, tmp_path):
    # a fraction so small that no estimate fits: the job must end in ERROR before it starts
    service = Service(tmp_path / "root", [data], token=TOKEN,
                      extra=("--disk-use-fraction", "1e-12", "--no-reports")).start()
    try:
        r = service.submit(job_toml(str(data / "quillfield.parquet")))
        assert r.status_code == 201 and r.json()["plan"]["estimated_output_bytes"] > 0
        job = service.wait_phase(r.json()["id"], ("ERROR", "COMPLETED"), 60)
        assert job["phase"] == "ERROR" and job["runs"] == 0, job
        assert "not started" in job["error"] and "estimated output" in job["error"]
        assert not Path(job["output"]).exists()
    finally:
        service.kill()


def test_metrics_are_valid_openmetrics_and_count_what_happened(kept, data):
    from prometheus_client.openmetrics.parser import text_string_to_metric_families

    assert run_one(kept, data, "night-metrics")["phase"] == COMPLETED
    with kept.client() as c:
        r = c.get("/metrics")
    assert r.status_code == 200
    assert r.headers["content-type"] == \
        "application/openmetrics-text; version=1.0.0; charset=utf-8"
    assert r.text.endswith("# EOF\n")
    families = {f.name: f for f in text_string_to_metric_families(r.text)}  # raises if invalid
    assert {"annotator_jobs", "annotator_queue_length", "annotator_rows_read",
            "annotator_rows_written", "annotator_rows_rejected", "annotator_worker_crashes",
            "annotator_job_duration_seconds"} <= set(families)
    assert families["annotator_rows_read"].type == "counter"
    assert families["annotator_job_duration_seconds"].type == "histogram"
    samples = {(s.name, tuple(sorted(s.labels.items()))): s.value
               for f in families.values() for s in f.samples}
    with kept.client() as c:
        jobs = c.get("/jobs").json()
    completed_rows = sum(j["rows_done"] for j in jobs["jobs"]
                         if j["phase"] in ("COMPLETED", "ARCHIVED"))
    # consistency checks against the service's own ledger
    assert samples[("annotator_rows_read_total", ())] >= completed_rows > 0
    assert samples[("annotator_rows_read_total", ())] == \
        samples[("annotator_rows_written_total", ())] + \
        samples[("annotator_rows_rejected_total", ())]
    for phase, n in jobs["counts"].items():
        assert samples[("annotator_jobs", (("phase", phase),))] == n
    count = samples[("annotator_job_duration_seconds_count", (("phase", "COMPLETED"),))]
    inf = samples[("annotator_job_duration_seconds_bucket",
                   (("le", "+Inf"), ("phase", "COMPLETED")))]
    assert count == inf >= 1


def test_metrics_need_the_token_like_the_rest_of_the_api(kept):
    r = httpx.get(kept.url + "/metrics", timeout=30)
    assert r.status_code == 401 and r.headers["www-authenticate"].startswith("Bearer")


class _ScriptedGuard:
    """A disk guard whose verdicts the test decides (the scheduler's side is under test)."""

    def __init__(self):
        self.answer = ("wait", "waiting for disk space: scripted")

    def verdict(self, estimated, waited_s):
        return self.answer


def test_the_scheduler_holds_a_job_that_does_not_fit_then_starts_or_fails_it(tmp_path,
                                                                             monkeypatch):
    import annotator.service.workers as workers
    from annotator.service.workers import WorkerPool

    monkeypatch.setattr(workers, "DISK_RECHECK_S", 0.0)
    ledger = Ledger(tmp_path)
    ids = []
    for i in range(2):
        rec = ledger.create(name=f"j{i}", job={}, base_dir="/", notes=[],
                            jobs_dir=tmp_path / "jobs", estimated_bytes=10 ** 9)
        ledger.queue(rec.id)
        ids.append(rec.id)
    guard = _ScriptedGuard()
    pool = WorkerPool(ledger, [tmp_path], disk_guard=guard)
    assert pool._fits_on_disk() is False and pool._fits_on_disk() is False
    held = ledger.get(ids[0])
    assert held.phase == "QUEUED" and held.waiting == "waiting for disk space: scripted"
    assert [e["message"] for e in ledger.history(ids[0])].count(held.waiting) == 1  # once
    assert ledger.get(ids[1]).waiting is None  # only the head of the queue waits
    guard.answer = ("start", None)
    assert pool._fits_on_disk() is True and ledger.get(ids[0]).waiting is None
    guard.answer = ("fail", "its estimated output does not fit")
    assert pool._fits_on_disk() is True  # both failed; the queue is then empty
    for ident in ids:
        failed = ledger.get(ident)
        assert failed.phase == "ERROR" and "not started: its estimated output" in failed.error
