"""The service's parts on their own: ledger phase rules, security checks, request parsing,
the client's path resolution. In-process and fast; the end-to-end tests are in
test_service_api.py."""

from __future__ import annotations

import json
import threading
from pathlib import Path

import pytest

from annotator.errors import ConfigError
from annotator.service.app import parse_job_body
from annotator.service.client import read_job_for_submission
from annotator.service.ledger import (ABORTED, COMPLETED, ERROR, EXECUTING, PENDING, QUEUED,
                                      Ledger, job_id, job_seq)
from annotator.service.security import (AccessError, check_bind, check_input_paths,
                                        is_loopback_host, resolve_data_roots, token_matches)

# IVOA UWS 1.1 (2016), section 2.1.3: the phases a job passes through.
UWS_NAMES = ("PENDING", "QUEUED", "EXECUTING", "COMPLETED", "ERROR", "ABORTED")


def _ledger(tmp_path, n=3):
    ledger = Ledger(tmp_path)
    ids = []
    for i in range(n):
        rec = ledger.create(name=f"j{i}", job={"input": {"paths": ["/x"]}}, base_dir="/",
                            notes=[], jobs_dir=tmp_path / "jobs")
        assert rec.phase == PENDING
        assert ledger.queue(rec.id)
        ids.append(rec.id)
    return ledger, ids


def test_phase_names_are_the_uws_ones():
    assert (PENDING, QUEUED, EXECUTING, COMPLETED, ERROR, ABORTED) == UWS_NAMES


def test_job_ids_round_trip_and_refuse_other_text():
    assert job_id(42) == "job-000042" and job_seq("job-000042") == 42
    assert job_seq("42") is None and job_seq("job-4x") is None and job_seq("job-") is None


def test_jobs_are_claimed_in_submission_order_and_requeued_in_place(tmp_path):
    ledger, ids = _ledger(tmp_path)
    first = ledger.claim_next()
    assert first.id == ids[0] and first.phase == EXECUTING and first.runs == 1
    assert ledger.requeue(first.id, "crashed", crashed=True)
    again = ledger.claim_next()  # the oldest again, before the younger ones
    assert again.id == ids[0] and again.runs == 2 and again.crashes == 1
    assert ledger.claim_next().id == ids[1]


def test_phase_changes_are_guarded_by_the_phase_they_leave(tmp_path):
    ledger, ids = _ledger(tmp_path, 2)
    rec = ledger.claim_next()
    assert ledger.abort(rec.id)
    # a worker finishing just after an abort does not win
    assert not ledger.complete(rec.id, manifest_path="m", rows_done=1, rows_per_second=1.0)
    assert not ledger.fail(rec.id, "late")
    assert not ledger.progress(rec.id, rows_done=5, rows_total=9, parts_done=1,
                               rows_per_second=1.0, eta_s=1.0)
    assert ledger.get(rec.id).phase == ABORTED
    assert not ledger.abort(rec.id)  # an ended job cannot be aborted again
    other = ledger.claim_next()
    assert ledger.complete(other.id, manifest_path="m", rows_done=7, rows_per_second=2.0)
    assert not ledger.abort(other.id) and not ledger.requeue(other.id, "no")
    assert ledger.counts()[COMPLETED] == 1 and ledger.counts()[ABORTED] == 1
    history = [e["phase"] for e in ledger.history(other.id)]
    assert history == [PENDING, QUEUED, EXECUTING, COMPLETED]


def test_concurrent_claims_never_hand_out_a_job_twice(tmp_path):
    ledger, ids = _ledger(tmp_path, 40)
    claimed: list[str] = []
    lock = threading.Lock()

    def claim():
        own = Ledger(tmp_path)  # as a separate process would: its own connection
        while (rec := own.claim_next()) is not None:
            with lock:
                claimed.append(rec.id)

    threads = [threading.Thread(target=claim) for _ in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(60)
    assert sorted(claimed) == sorted(ids)


def test_list_limit_gives_the_most_recent_in_order(tmp_path):
    ledger, ids = _ledger(tmp_path, 5)
    assert [r.id for r in ledger.list(limit=2)] == ids[-2:]
    assert [r.id for r in ledger.list()] == ids


def test_loopback_detection():
    # RFC 1122 (1989), 3.2.1.3 and RFC 4291 (2006), 2.5.3: 127/8 and ::1 are loopback;
    # 192.0.2.0/24 is TEST-NET-1 (RFC 5737, 2010), never loopback.
    for host in ("127.0.0.1", "127.8.9.10", "::1", "[::1]", "localhost"):
        assert is_loopback_host(host), host
    for host in ("0.0.0.0", "::", "192.0.2.1", "no-such-host.invalid"):
        assert not is_loopback_host(host), host


def test_a_non_loopback_bind_needs_a_long_enough_token():
    check_bind("127.0.0.1", None)
    with pytest.raises(ConfigError, match="not a loopback address"):
        check_bind("0.0.0.0", None)
    with pytest.raises(ConfigError, match="at least 16 characters"):
        check_bind("0.0.0.0", "short")
    check_bind("0.0.0.0", "x" * 32)


def test_token_comparison():
    # RFC 6750 (2012), section 2.1: "Authorization: Bearer <token>"
    token = "s3cret-" + "k" * 20
    assert token_matches(f"Bearer {token}", token)
    assert token_matches(f"bearer {token}", token)  # the scheme is case-insensitive
    for header in (None, "", token, f"Basic {token}", f"Bearer {token}x", "Bearer "):
        assert not token_matches(header, token), header


def test_data_roots_must_exist_and_not_be_the_file_system_root(tmp_path):
    assert resolve_data_roots([tmp_path, tmp_path / "."]) == [tmp_path.resolve()]
    with pytest.raises(ConfigError, match="no such folder"):
        resolve_data_roots([tmp_path / "missing"])
    with pytest.raises(ConfigError, match="too wide"):
        resolve_data_roots(["/"])
    with pytest.raises(ConfigError, match="at least one"):
        resolve_data_roots([])


def test_input_path_checks_resolve_links_and_dot_dot(tmp_path):
    root = tmp_path / "data"
    (root / "sub").mkdir(parents=True)
    (tmp_path / "elsewhere").mkdir()
    (root / "sub" / "out").symlink_to(tmp_path / "elsewhere")
    check_input_paths(["sub/a.parquet"], [root / "sub" / "a.parquet"], [root])
    check_input_paths([str(root)], [root], [root])  # the root itself is inside
    # '..', a link to a folder outside, and a sibling whose name merely starts like the root
    for raw in (str(root / ".." / "elsewhere"), str(root / "sub" / "out" / "x.parquet"),
                str(tmp_path / "data-sibling")):
        with pytest.raises(AccessError, match="outside the data roots"):
            check_input_paths([raw], [Path(raw)], [root])


def test_toml_and_json_bodies_give_the_same_mapping():
    toml = b'[input]\npaths = ["/d/a.parquet"]\n[output]\nchunk_rows = 5000\n'
    as_json = json.dumps({"input": {"paths": ["/d/a.parquet"]},
                          "output": {"chunk_rows": 5000}}).encode()
    assert parse_job_body(toml, "application/toml") == parse_job_body(as_json,
                                                                       "application/json")
    assert parse_job_body(toml, "text/plain; charset=utf-8")["output"]["chunk_rows"] == 5000
    with pytest.raises(ConfigError, match="not UTF-8"):
        parse_job_body(b"\xff\xfe", "application/toml")


def test_the_client_resolves_relative_inputs_against_the_job_file(tmp_path):
    folder = tmp_path / "jobs" / "nightly"
    folder.mkdir(parents=True)
    (folder / "job.toml").write_text('[input]\npaths = ["../../drops/a.parquet", "/abs/b"]\n')
    mapping, base = read_job_for_submission(folder / "job.toml")
    assert base == folder.resolve()
    assert mapping["input"]["paths"] == [str((tmp_path / "drops" / "a.parquet").resolve()),
                                         "/abs/b"]
    (folder / "job.json").write_text(json.dumps({"input": {"paths": "c.parquet"}}))
    mapping, _ = read_job_for_submission(folder / "job.json")
    assert mapping["input"]["paths"] == [str(folder.resolve() / "c.parquet")]


def test_only_finished_jobs_are_deleted_and_ids_are_never_reused(tmp_path):
    ledger, (a, b, c) = _ledger(tmp_path)
    assert not ledger.delete(a)  # QUEUED: abort it first
    assert ledger.abort(a) and ledger.delete(a)
    assert ledger.get(a) is None and ledger.history(a) == []
    assert not ledger.delete(a)  # already gone
    assert ledger.abort(c) and ledger.delete(c)  # the newest: its id must not come back
    fresh = ledger.create(name="d", job={"input": {"paths": ["/x"]}}, base_dir="/", notes=[],
                          jobs_dir=tmp_path / "jobs")
    assert fresh.id not in (a, b, c)
    assert [r.id for r in ledger.list()] == [b, fresh.id]
