"""End to end through the CLI: output layout, counts, provenance, overwrite and resume."""

from __future__ import annotations

import json
import xml.etree.ElementTree as ET

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from annotator.cli import main
from annotator.cosmology import preset
from annotator.io.checkpoint import CheckpointLog

BUILTIN_COLUMNS = [
    "comoving_distance_mpc", "transverse_comoving_distance_mpc", "angular_diameter_distance_mpc",
    "luminosity_distance_mpc", "distance_modulus_mag", "lookback_time_gyr", "age_at_emission_gyr",
    "recession_velocity_now_c", "recession_velocity_at_emission_c", "reachable",
    "horizon_crossing_age_gyr", "signal_arrival_age_gyr",
    # uncertainties: the fixture catalogue has z_err, detected as the redshift error
    "comoving_distance_err_mpc", "luminosity_distance_err_mpc", "distance_modulus_err_mag",
    "lookback_time_err_gyr", "age_at_emission_err_gyr", "reachable_probability",
    "annotation_flags",
]


def _read(out):
    return pa.concat_tables(pq.read_table(p) for p in sorted(out.glob("part-*.parquet")))


def _run(*args):
    return main(["run", *map(str, args), "--quiet"])


def test_run_adds_every_builtin_column_and_keeps_inputs(catalogue_parquet, catalogue_table,
                                                        tmp_path):
    out = tmp_path / "out"
    assert _run(catalogue_parquet, "--out", out, "--chunk-rows", 2000) == 0
    parts = sorted(p.name for p in out.glob("part-*.parquet"))
    assert parts == ["part-00000-000000.parquet", "part-00000-000001.parquet",
                     "part-00000-000002.parquet"]
    table = _read(out)
    assert table.column_names == catalogue_table.column_names + BUILTIN_COLUMNS
    # every input column unchanged in value and type
    assert table.select(catalogue_table.column_names).equals(catalogue_table)
    # values are the cosmology's (planck2018 is the default)
    cosmo = preset("planck2018")
    z = catalogue_table.column("z").to_numpy(zero_copy_only=False)
    good = np.isfinite(z) & (z >= 0)
    dc = table.column("comoving_distance_mpc").to_numpy(zero_copy_only=False)
    np.testing.assert_allclose(dc[good], cosmo.comoving_distance_mpc(z[good]), rtol=1e-12)
    # bad redshifts: nulls and flags, rows kept in place
    flags = table.column("annotation_flags").to_pylist()
    assert flags[:3] == ["redshift_missing"] * 3
    assert flags[3:5] == ["redshift_negative"] * 2
    assert set(flags[5:]) == {""}
    assert table.column("comoving_distance_mpc").null_count == 5
    assert table.column("reachable").null_count == 5
    reach = table.column("reachable").to_numpy(zero_copy_only=False)[good].astype(bool)
    arrival = table.column("signal_arrival_age_gyr").to_numpy(zero_copy_only=False)[good]
    assert np.all(np.isnan(arrival[~reach])) and np.all(np.isfinite(arrival[reach]))

    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["rows_read"] == 5000 == manifest["rows_written"] + manifest["rows_rejected"]
    assert manifest["rows_flagged"] == 5
    assert manifest["flags"]["counts"]["redshift_missing"] == 3
    assert manifest["cosmology"]["parameters"]["name"] == "planck2018"
    assert manifest["cosmology"]["derived"]["age_today_gyr"] == pytest.approx(13.79, abs=0.02)
    assert len(manifest["inputs"][0]["sha256"]) == 64
    assert {a["name"] for a in manifest["annotators"]} >= {"distances", "horizons"}
    assert not list(out.rglob("*.tmp"))


def test_parts_carry_voparquet_metadata(catalogue_parquet, tmp_path):
    out = tmp_path / "out"
    _run(catalogue_parquet, "--out", out)
    meta = pq.read_schema(next(out.glob("part-*.parquet"))).metadata
    # VOParquet 1.0 (IVOA Note 2025): version key and a VOTable header with a FIELD per column
    assert meta[b"IVOA.VOTable-Parquet.version"] == b"1.0"
    root = ET.fromstring(meta[b"IVOA.VOTable-Parquet.content"])
    ns = {"v": "http://www.ivoa.net/xml/VOTable/v1.3"}
    fields = {f.get("name"): f for f in root.iterfind(".//v:FIELD", ns)}
    assert fields["comoving_distance_mpc"].get("unit") == "Mpc"
    assert fields["comoving_distance_mpc"].get("ucd") == "pos.distance;phys.cosmology"
    assert fields["lookback_time_gyr"].get("unit") == "Gyr"
    assert fields["distance_modulus_mag"].get("ucd") == "phot.mag.distMod"
    assert fields["reachable"].get("datatype") == "boolean"
    assert fields["objid"].get("datatype") == "long"
    assert fields["comoving_distance_mpc"].find("v:DESCRIPTION", ns).text
    prov = json.loads(meta[b"annotator.provenance"])
    assert prov["cosmology"]["parameters"]["name"] == "planck2018"


def test_voparquet_header_is_a_valid_votable(catalogue_parquet, tmp_path):
    votable = pytest.importorskip("astropy.io.votable")  # outside reference: the VOTable parser
    import io

    out = tmp_path / "out"
    _run(catalogue_parquet, "--out", out)
    meta = pq.read_schema(next(out.glob("part-*.parquet"))).metadata
    doc = votable.parse(io.BytesIO(meta[b"IVOA.VOTable-Parquet.content"]), verify="exception")
    fields = {f.name: f for f in doc.get_first_table().fields}
    assert str(fields["luminosity_distance_mpc"].unit) == "Mpc"


def test_second_run_refuses_then_overwrites(catalogue_parquet, tmp_path, capsys):
    out = tmp_path / "out"
    assert _run(catalogue_parquet, "--out", out) == 0
    assert _run(catalogue_parquet, "--out", out) == 2
    assert "not empty" in capsys.readouterr().err
    assert _run(catalogue_parquet, "--out", out, "--overwrite") == 0


def test_overwrite_never_deletes_foreign_files(catalogue_parquet, tmp_path, capsys):
    out = tmp_path / "out"
    out.mkdir()
    (out / "thesis.tex").write_text("precious")
    assert _run(catalogue_parquet, "--out", out, "--overwrite") == 2
    assert "thesis.tex" in capsys.readouterr().err
    assert (out / "thesis.tex").read_text() == "precious"


def test_resume_after_a_crash_gives_the_same_output(catalogue_parquet, tmp_path):
    full, crashed = tmp_path / "full", tmp_path / "crashed"
    _run(catalogue_parquet, "--out", full, "--chunk-rows", 1000)
    _run(catalogue_parquet, "--out", crashed, "--chunk-rows", 1000)
    # simulate a crash after part 2: later parts half-written or never committed
    log = CheckpointLog(crashed)
    records = log.records()[:2]
    log.path.write_text("".join(json.dumps(r) + "\n" for r in records) + '{"part": "torn')
    (crashed / "manifest.json").unlink()
    (crashed / "part-00000-000003.parquet").unlink()
    (crashed / "part-00000-000004.parquet").write_bytes(b"garbage")
    (crashed / "part-00000-000002.parquet.tmp").write_bytes(b"half")
    assert _run(catalogue_parquet, "--out", crashed, "--chunk-rows", 1000, "--resume") == 0
    a, b = _read(full), _read(crashed)
    assert a.equals(b)
    m = json.loads((crashed / "manifest.json").read_text())
    assert m["rows_read"] == 5000 and len(m["parts"]) == 5
    assert not list(crashed.rglob("*.tmp"))


def test_resume_refuses_a_different_job(catalogue_parquet, tmp_path, capsys):
    out = tmp_path / "out"
    _run(catalogue_parquet, "--out", out, "--chunk-rows", 1000)
    assert _run(catalogue_parquet, "--out", out, "--chunk-rows", 2000, "--resume") == 2
    assert "different job" in capsys.readouterr().err


def test_csv_input_sets_rows_aside_and_counts_reconcile(tmp_path):
    path = tmp_path / "cat.csv"
    rows = ["objid,z,mag_r"] + [f"{i},{0.01 + i * 1e-3},{20 + i * 1e-3}" for i in range(3000)]
    rows.insert(10, "bad,line")
    rows.insert(20, "77,notanumber,20.0")
    path.write_text("\n".join(rows) + "\n")
    out = tmp_path / "out"
    assert _run(path, "--out", out, "--chunk-rows", 1000) == 0
    m = json.loads((out / "manifest.json").read_text())
    assert (m["rows_read"], m["rows_written"], m["rows_rejected"]) == (3002, 3000, 2)
    rejected = pa.concat_tables(pq.read_table(p) for p in (out / "rejected").glob("*.parquet"))
    assert sorted(rejected.column("row").to_pylist()) == [11, 21]
    assert rejected.column_names == ["source", "row", "reason", "raw"]


def test_empty_catalogue_still_gives_a_readable_part(tmp_path):
    path = tmp_path / "empty.csv"
    path.write_text("objid,z\n")
    out = tmp_path / "out"
    assert _run(path, "--out", out) == 0
    table = _read(out)
    assert table.num_rows == 0 and "comoving_distance_mpc" in table.column_names


def test_dry_run_reads_no_rows_and_writes_nothing(catalogue_parquet, tmp_path, capsys):
    out = tmp_path / "out"
    assert main(["run", str(catalogue_parquet), "--out", str(out), "--dry-run"]) == 0
    text = capsys.readouterr().out
    for word in ("column mapping", "redshift", "distances", "comoving_distance_mpc",
                 "estimated output size", "planck2018"):
        assert word in text
    assert not out.exists()


@pytest.mark.parametrize("make_args,needle", [
    (lambda t: ["run", str(t / "missing.parquet"), "--out", str(t / "o")], "missing.parquet"),
    (lambda t: ["run", str(t / "bad.parquet"), "--out", str(t / "o")], "bad.parquet"),
    (lambda t: ["run", str(t / "noz.parquet"), "--out", str(t / "o")], "'redshift'"),
    (lambda t: ["run", "--config", str(t / "unknown_key.toml")], "[output].directory"),
    (lambda t: ["run", "--config", str(t / "bad_cosmo.toml")], "omega_m"),
    (lambda t: ["run", str(t / "noz.parquet"), "--out", str(t / "o"), "--cosmology",
                "planck1999"], "planck1999"),
    (lambda t: ["run", str(t / "noz.parquet"), "--out", str(t / "o"), "--chunk-rows", "5"],
     "--chunk-rows"),
])
def test_user_errors_are_one_line_without_traceback(tmp_path, capsys, make_args, needle,
                                                    catalogue_parquet):
    (tmp_path / "bad.parquet").write_bytes(b"not parquet at all")
    pq.write_table(pa.table({"objid": [1], "mag": [20.0]}), tmp_path / "noz.parquet")
    (tmp_path / "unknown_key.toml").write_text(
        f'[input]\npaths = ["{catalogue_parquet}"]\n[output]\ndirectory = "x"\n')
    (tmp_path / "bad_cosmo.toml").write_text(
        f'[input]\npaths = ["{catalogue_parquet}"]\n[output]\ndir = "x"\n'
        '[cosmology]\nh0 = 70\nomega_m = -0.3\n')
    assert main(make_args(tmp_path)) == 2
    err = capsys.readouterr().err
    assert needle in err
    assert "Traceback" not in err
    assert err.startswith("annotator: error:") or "annotator: error:" in err


def test_job_file_paths_are_relative_to_the_job_file(tmp_path, catalogue_table):
    data = tmp_path / "survey"
    data.mkdir()
    pq.write_table(catalogue_table, data / "cat.parquet")
    job = data / "job.toml"
    job.write_text('[input]\npaths = ["cat.parquet"]\n[output]\ndir = "annotated"\n'
                   '[cosmology]\npreset = "textbook"\n[columns]\nredshift = "z"\n'
                   '[annotators]\nvelocities = false\n')
    assert main(["run", "--config", str(job), "--quiet"]) == 0
    table = _read(data / "annotated")
    assert "recession_velocity_now_c" not in table.column_names
    m = json.loads((data / "annotated" / "manifest.json").read_text())
    assert m["cosmology"]["parameters"]["name"] == "textbook"
