"""The Dask engine against the local engine: the same job into two folders, the same output.

The reference for every identity check is the local engine run in the same module (the issue's
definition of correct: same part files, same rows, values bit for bit, same column order and
types, same counts, same rejected rows, same VOParquet metadata). One outside check pins the
values themselves: comoving distances from the Dask run against astropy's FlatLambdaCDM
(Hogg 1999, astro-ph/9905116, eq. 15, integrated by astropy).

One LocalCluster of 2 worker processes serves the whole module: separate processes are what
catch pickling mistakes (a task or a shared object that does not survive the trip).
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import signal
import subprocess
import sys
import threading
import time

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

distributed = pytest.importorskip("distributed")

from annotator.cli import main  # noqa: E402
from annotator.config import job_from_mapping  # noqa: E402
from annotator.engines import dask as dask_engine  # noqa: E402
from annotator.errors import ConfigError, UserError  # noqa: E402
from annotator.io.checkpoint import CheckpointLog  # noqa: E402
from annotator.plan import build_plan  # noqa: E402
from annotator.runner import run_plan  # noqa: E402
from catalogue_factory import make_catalogue  # noqa: E402

CHUNK = 1000
# Keys of the manifest that describe the run rather than its result.
RUN_KEYS = ("engine", "started_at", "finished_at", "elapsed_s", "rows_per_second", "host", "pid")


@pytest.fixture(scope="module")
def cluster():
    with distributed.LocalCluster(n_workers=2, processes=True, threads_per_worker=1,
                                  dashboard_address=":0") as c:
        yield c


@pytest.fixture(scope="module")
def client(cluster):
    with distributed.Client(cluster) as cl:
        yield cl


@pytest.fixture(scope="module")
def inputs(tmp_path_factory):
    """Two Parquet sources (row groups not aligned with the chunks, a short last chunk) and a
    CSV with malformed lines."""
    d = tmp_path_factory.mktemp("inputs")
    pq.write_table(make_catalogue(5000, seed=7), d / "a.parquet", row_group_size=1500)
    pq.write_table(make_catalogue(2345, seed=8), d / "b.parquet", row_group_size=700)
    lines = make_catalogue(3100, seed=9).to_pandas().to_csv(index=False).splitlines()
    header_fields = lines[0].count(",") + 1
    lines.insert(15, "1,2,3")  # too few fields
    lines.insert(1200, ",".join(["9"] * (header_fields + 2)))  # too many fields
    fields = lines[2500].split(",")
    fields[3] = "not-a-redshift"  # text where the redshift (a number) belongs
    lines[2500] = ",".join(fields)
    lines.insert(2800, "")  # a blank line is no row at all
    (d / "c.csv").write_text("\n".join(lines) + "\n")
    empty = make_catalogue(10).slice(0, 0)
    pq.write_table(empty, d / "empty.parquet")
    return d


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """The local engine's output for a list of inputs, run once per module."""
    done = {}

    def local_output(paths):
        key = tuple(str(p) for p in paths)
        if key not in done:
            done[key] = tmp_path_factory.mktemp("local")
            _run(paths, done[key], "local")
        return done[key]
    return local_output


def _job(paths, out, **extra):
    return job_from_mapping({"output": {"chunk_rows": CHUNK, **extra}},
                            inputs=[str(p) for p in paths], output_dir=str(out),
                            cosmology_preset="textbook")


def _run(paths, out, engine, cluster=None, resume=False, **kw):
    options = {"scheduler": cluster.scheduler_address} if engine == "dask" else None
    return run_plan(build_plan(_job(paths, out)), engine=engine, resume=resume,
                    engine_options=options, **kw)


def _sha(path):
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _assert_columns_bitwise_equal(a: pa.Table, b: pa.Table, where: str) -> None:
    """``Table.equals`` compares NaN as unequal to itself, so floats are compared as bits."""
    for name in a.column_names:
        x, y = a.column(name).combine_chunks(), b.column(name).combine_chunks()
        if pa.types.is_floating(x.type):
            assert x.is_null().equals(y.is_null()), f"{where}: {name} nulls differ"
            bits_x = np.asarray(x.fill_null(0.0)).view(np.uint64)
            bits_y = np.asarray(y.fill_null(0.0)).view(np.uint64)
            assert np.array_equal(bits_x, bits_y), f"{where}: {name} values differ"
        else:
            assert x.equals(y), f"{where}: {name} values differ"


def assert_same_output(local, dask):
    names = sorted(p.name for p in local.glob("part-*.parquet"))
    assert names == sorted(p.name for p in dask.glob("part-*.parquet"))
    for name in names:
        a, b = pq.read_table(local / name), pq.read_table(dask / name)
        # column order and types, and the file-level metadata (VOParquet 1.0, IVOA Note 2025:
        # IVOA.VOTable-Parquet.version / .content; plus annotator.provenance)
        assert a.schema.equals(b.schema, check_metadata=True), name
        meta = pq.read_schema(dask / name).metadata
        assert meta[b"IVOA.VOTable-Parquet.version"] == b"1.0"
        assert meta == pq.read_schema(local / name).metadata
        assert a.num_rows == b.num_rows, name
        _assert_columns_bitwise_equal(a, b, name)
        if not any(a.column(n).null_count or pa.types.is_floating(a.schema.field(n).type)
                   for n in a.column_names):
            assert a.equals(b)
        assert _sha(local / name) == _sha(dask / name), f"{name}: file bytes differ"
    rejected = sorted(p.name for p in (local / "rejected").glob("*.parquet"))
    assert rejected == sorted(p.name for p in (dask / "rejected").glob("*.parquet"))
    for name in rejected:
        assert pq.read_table(local / "rejected" / name).equals(
            pq.read_table(dask / "rejected" / name)), name
    m_local = json.loads((local / "manifest.json").read_text())
    m_dask = json.loads((dask / "manifest.json").read_text())
    assert (m_local["engine"], m_dask["engine"]) == ("local", "dask")
    for m in (m_local, m_dask):
        for key in RUN_KEYS:
            m.pop(key)
        m["job"].pop("output_dir")
        assert m["rows_read"] == m["rows_written"] + m["rows_rejected"]
    assert m_local == m_dask
    # the same checkpoint records (in completion order on the cluster), so resume works
    # across engines

    def records(d):
        return sorted(({k: v for k, v in r.items() if k != "committed_at"}
                       for r in CheckpointLog(d).records()),
                      key=lambda r: (r["source"], r["chunk"]))
    assert records(local) == records(dask)


def test_parquet_sources_give_identical_output(inputs, cluster, reference, tmp_path):
    paths = [inputs / "a.parquet", inputs / "b.parquet"]
    m_dask = _run(paths, tmp_path / "dask", "dask", cluster)
    assert m_dask["rows_read"] == 5000 + 2345
    assert len(m_dask["parts"]) == 5 + 3
    assert_same_output(reference(paths), tmp_path / "dask")

    # Outside check of the values a worker computed: D_C in the round-number flat model
    # (H0 = 70, Omega_m = 0.3, no radiation), Hogg 1999 eq. 15, as integrated by astropy.
    from astropy.cosmology import FlatLambdaCDM

    ref = FlatLambdaCDM(H0=70.0, Om0=0.3, Tcmb0=0.0)
    part = pq.read_table(tmp_path / "dask" / "part-00001-000002.parquet")
    z = part.column("z").to_numpy(zero_copy_only=False)[:50]
    dc = part.column("comoving_distance_mpc").to_numpy(zero_copy_only=False)[:50]
    np.testing.assert_allclose(dc, ref.comoving_distance(z).value, rtol=1e-6)


def test_csv_with_malformed_lines_gives_identical_output_and_rejects(inputs, cluster,
                                                                     tmp_path):
    paths = [inputs / "c.csv"]
    m_local = _run(paths, tmp_path / "local", "local")
    m_dask = _run(paths, tmp_path / "dask", "dask", cluster)
    # 3100 rows + 2 lines with the wrong number of fields; one row has text for z
    assert (m_dask["rows_read"], m_dask["rows_written"], m_dask["rows_rejected"]) == \
        (3102, 3099, 3) == (m_local["rows_read"], m_local["rows_written"],
                            m_local["rows_rejected"])
    assert_same_output(tmp_path / "local", tmp_path / "dask")


def test_empty_catalogue(inputs, cluster, tmp_path):
    _run([inputs / "empty.parquet"], tmp_path / "local", "local")
    m = _run([inputs / "empty.parquet"], tmp_path / "dask", "dask", cluster)
    assert m["rows_read"] == 0 and len(m["parts"]) == 1
    assert_same_output(tmp_path / "local", tmp_path / "dask")


def test_pipeline_reaches_each_worker_once_not_once_per_chunk(inputs, cluster, client,
                                                             tmp_path):
    client.run(dask_engine.reset_worker_stats)
    _run([inputs / "a.parquet", inputs / "b.parquet"], tmp_path / "dask", "dask", cluster)
    stats = client.run(dask_engine.worker_stats)
    assert len(stats) == 2
    assert sum(s["chunks_committed"] for s in stats.values()) == 8
    # one prepared pipeline (cosmology tables built once) per worker that did any work
    for s in stats.values():
        assert s["pipelines_prepared"] == (1 if s["chunks_committed"] else 0)


def _crash(out, keep_chunks):
    """Leave ``out`` as a crash would: records only for ``keep_chunks`` (in any order),
    a torn last line, no manifest, some later parts missing, one committed but unrecorded,
    a half-written temporary."""
    log = CheckpointLog(out)
    records = [r for r in log.records() if (r["source"], r["chunk"]) in keep_chunks]
    log.path.write_text("".join(json.dumps(r) + "\n" for r in records) + '{"part": "torn')
    (out / "manifest.json").unlink()
    parts = sorted(out.glob("part-*.parquet"))
    kept_names = {r["part"] for r in records}
    lost = [p for p in parts if p.name not in kept_names]
    for p in lost[1:]:
        p.unlink()
    (out / (lost[0].name + ".tmp")).write_bytes(b"half a part")
    return len(lost)


@pytest.mark.parametrize("first,second", [("dask", "dask"), ("local", "dask"),
                                          ("dask", "local")])
def test_resume_after_a_crash_finishes_identically(inputs, cluster, reference, tmp_path, first,
                                                   second):
    paths = [inputs / "a.parquet", inputs / "c.csv"]
    expected = reference(paths)
    out = tmp_path / "crashed"
    _run(paths, out, first, cluster)
    assert _crash(out, {(0, 3), (0, 0), (1, 1), (0, 4)}) == 9 - 4
    _run(paths, out, second, cluster, resume=True)
    assert not list(out.rglob("*.tmp"))
    if second == "dask":
        assert_same_output(expected, out)
    else:  # a local resume keeps the checkpoint order, so compare everything but that
        ref = json.loads((expected / "manifest.json").read_text())
        got = json.loads((out / "manifest.json").read_text())
        assert sorted(got["parts"], key=lambda p: p["part"]) == ref["parts"]
        for name in (p["part"] for p in ref["parts"]):
            assert _sha(expected / name) == _sha(out / name)


def test_cancelled_run_resumes_to_the_same_output(inputs, cluster, reference, tmp_path):
    paths = [inputs / "a.parquet", inputs / "b.parquet"]
    out = tmp_path / "dask"
    cancel = threading.Event()

    def stop_after_two(progress):
        if progress.parts_done >= 2:
            cancel.set()

    plan = build_plan(_job(paths, out))
    with pytest.raises(UserError, match="cancelled"):
        dask_engine.run_dask(plan, scheduler=cluster.scheduler_address, progress=stop_after_two,
                             cancel=cancel)
    committed = CheckpointLog(out).records()
    assert 2 <= len(committed) < 8 and not (out / "manifest.json").exists()
    _run(paths, out, "dask", cluster, resume=True)
    assert_same_output(reference(paths), out)


def test_a_worker_error_reaches_the_driver_as_the_same_user_error(inputs, cluster, tmp_path):
    """An input that vanishes after planning: the worker's InputError names the file."""
    src = tmp_path / "gone.parquet"
    shutil.copy(inputs / "b.parquet", src)
    plan = build_plan(_job([src], tmp_path / "dask"))
    chunk = dask_engine.ParquetChunkTask(plan.sources[0], 1, CHUNK, plan.catalogue_schema)
    assert chunk.read().table.num_rows == CHUNK
    pq.write_table(make_catalogue(1500), src)  # now too short for chunk 2
    with distributed.Client(cluster) as c:
        late = dask_engine.ParquetChunkTask(plan.sources[0], 2, CHUNK, plan.catalogue_schema)
        with pytest.raises(UserError, match="gone.parquet"):
            c.submit(late.read).result()


def test_cli_on_its_own_local_cluster(inputs, tmp_path, capsys):
    out = tmp_path / "cli"
    code = main(["run", str(inputs / "b.parquet"), "--out", str(out), "--chunk-rows",
                 str(CHUNK), "--cosmology", "textbook", "--engine", "dask", "--workers", "1",
                 "--quiet"])
    assert code == 0
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["engine"] == "dask" and manifest["rows_written"] == 2345
    assert len(list(out.glob("part-*.parquet"))) == 3


def test_unreachable_scheduler_and_bad_worker_counts_are_user_errors(inputs, tmp_path,
                                                                    monkeypatch, capsys):
    monkeypatch.setattr(dask_engine, "CONNECT_TIMEOUT_S", 1.0)
    out = tmp_path / "never"
    with pytest.raises(ConfigError, match="tcp://127.0.0.1:9"):
        _run_with([inputs / "b.parquet"], out, scheduler="tcp://127.0.0.1:9")
    assert not out.exists()  # nothing was touched before the cluster answered
    with pytest.raises(ConfigError, match="no such scheduler file"):
        _run_with([inputs / "b.parquet"], out, scheduler=str(tmp_path / "scheduler.json"))
    with pytest.raises(ConfigError, match="--workers"):
        _run_with([inputs / "b.parquet"], out, workers=0)
    code = main(["run", str(inputs / "b.parquet"), "--out", str(out), "--engine", "dask",
                 "--scheduler", "tcp://127.0.0.1:9", "--quiet"])
    err = capsys.readouterr().err
    errors = [line for line in err.splitlines() if line.startswith("annotator: error:")]
    assert code == 2 and "Traceback" not in err
    assert len(errors) == 1 and "tcp://127.0.0.1:9" in errors[0]


def _run_with(paths, out, **options):
    return run_plan(build_plan(_job(paths, out)), engine="dask", engine_options=options)


def test_workers_that_cannot_see_the_output_are_named(inputs, cluster, client, tmp_path,
                                                      monkeypatch):
    """A worker that cannot see the folder (as on a cluster without a shared filesystem)."""
    plan = build_plan(_job([inputs / "b.parquet"], tmp_path / "dask"))
    from annotator.pipeline import Pipeline

    pipeline = Pipeline.from_plan(plan)
    with pytest.raises(ConfigError, match="cannot see the output folder"):
        dask_engine._check_workers(client, pipeline, plan, tmp_path / "not-shared")


def test_driver_killed_mid_run_then_resumed_gives_the_same_output(inputs, cluster, tmp_path):
    """SIGKILL the driver (``annotator run --engine dask``) once two parts are committed;
    its tasks still running on the cluster finish their part; the resumed run waits for them
    and then completes the job."""
    src = tmp_path / "long.parquet"
    pq.write_table(make_catalogue(20_000, seed=11), src, row_group_size=4096)
    _run([src], tmp_path / "local", "local")
    out = tmp_path / "dask"
    driver = subprocess.Popen(
        [sys.executable, "-m", "annotator", "run", str(src), "--out", str(out),
         "--chunk-rows", str(CHUNK), "--cosmology", "textbook", "--engine", "dask",
         "--scheduler", cluster.scheduler_address, "--quiet"],
        stdout=subprocess.DEVNULL, stderr=open(tmp_path / "driver.err", "wb"))
    log = CheckpointLog(out)
    deadline = time.monotonic() + 60
    while len(log.records()) < 2 and driver.poll() is None and time.monotonic() < deadline:
        time.sleep(0.01)
    assert driver.poll() is None, (tmp_path / "driver.err").read_text()[-3000:]
    driver.send_signal(signal.SIGKILL)
    driver.wait()
    assert not (out / "manifest.json").exists(), "the run ended before it could be killed"
    assert 2 <= len(log.records()) < 20
    _run([src], out, "dask", cluster, resume=True)
    assert_same_output(tmp_path / "local", out)


def test_a_worker_killed_mid_run_is_replaced_and_the_output_is_the_same(inputs, cluster, client,
                                                                      tmp_path):
    """Dask reruns the tasks of a dead worker elsewhere; a part is written whole or not at all
    (atomic rename), so the rerun leaves exactly the parts of an undisturbed run."""
    src = tmp_path / "long.parquet"
    pq.write_table(make_catalogue(12_000, seed=12), src, row_group_size=4096)
    _run([src], tmp_path / "local", "local")
    before = client.run(os.getpid)
    victim = sorted(before.items())[0]
    killed = []

    def kill_once(progress):
        if not killed and progress.parts_done >= 2:
            os.kill(victim[1], signal.SIGKILL)
            killed.append(victim)

    _run([src], tmp_path / "dask", "dask", cluster, progress=kill_once)
    assert killed
    assert_same_output(tmp_path / "local", tmp_path / "dask")
    client.wait_for_workers(2, timeout=60)  # the nanny restarts it for the tests after this
    assert victim[1] not in client.run(os.getpid).values()


def test_a_worker_computing_differently_is_refused_before_any_part(inputs, cluster, client,
                                                                   tmp_path):
    """One worker with other annotator code (as after an upgrade without a restart): the
    probe comparison names it and the column, and nothing is written."""
    victim = sorted(client.scheduler_info()["workers"])[0]

    def patch():
        import annotator_plugins.distances as d

        original = d.Distances.annotate

        def shifted(self, batch):
            out = original(self, batch)
            out["comoving_distance_mpc"] = out["comoving_distance_mpc"] * (1 + 1e-15)
            return out
        d.Distances._unpatched = original
        d.Distances.annotate = shifted

    def unpatch():
        import annotator_plugins.distances as d

        d.Distances.annotate = d.Distances._unpatched

    client.run(patch, workers=[victim])
    try:
        with pytest.raises(ConfigError, match=rf"{victim}.*'comoving_distance_mpc'"):
            _run([inputs / "b.parquet"], tmp_path / "dask", "dask", cluster)
    finally:
        client.run(unpatch, workers=[victim])
    assert not list((tmp_path / "dask").glob("part-*"))


def test_a_new_run_waits_for_chunks_an_earlier_run_is_still_writing(inputs, cluster, client,
                                                                   tmp_path, monkeypatch):
    """A worker still writing into the folder (a task of a dead driver) holds the run back;
    the run goes ahead once it is done."""
    out = (tmp_path / "dask").resolve()
    victim = sorted(client.scheduler_info()["workers"])[0]

    def pretend_busy(folder, n):
        from annotator.engines import dask as engine

        if n:
            engine._writing_to[folder] = n
        else:
            engine._writing_to.pop(folder, None)

    client.run(pretend_busy, str(out), 1, workers=[victim])
    monkeypatch.setattr(dask_engine, "EARLIER_TASKS_WAIT_S", 0.5)
    try:
        with pytest.raises(ConfigError, match="still being written"):
            _run([inputs / "b.parquet"], out, "dask", cluster)
    finally:
        client.run(pretend_busy, str(out), 0, workers=[victim])
    assert not out.exists()  # refused before the folder was touched
    monkeypatch.setattr(dask_engine, "EARLIER_TASKS_WAIT_S", 30.0)
    client.run(pretend_busy, str(out), 1, workers=[victim])
    release = threading.Timer(1.0, lambda: client.run(pretend_busy, str(out), 0,
                                                      workers=[victim]))
    release.start()
    t0 = time.monotonic()
    m = _run([inputs / "b.parquet"], out, "dask", cluster)
    assert time.monotonic() - t0 >= 0.9 and m["rows_written"] == 2345
    release.join()


def test_too_few_workers_joining_is_a_user_error(inputs, cluster, tmp_path, monkeypatch):
    monkeypatch.setattr(dask_engine, "WORKER_WAIT_S", 0.5)
    with pytest.raises(ConfigError, match="2 worker\\(s\\) connected, 5 wanted"):
        _run_with([inputs / "b.parquet"], tmp_path / "never", scheduler=cluster.scheduler_address,
                  workers=5)
    assert not (tmp_path / "never").exists()
