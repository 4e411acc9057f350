"""`annotator describe` and `annotator export --duckdb`."""

from __future__ import annotations

import json

import duckdb
import pyarrow.compute as pc
import pytest
from _sql_helpers import folder_digest, read_output, run_cli


def test_describe_json_agrees_with_the_manifest_and_the_part_files(outputs, capsys):
    manifest = json.loads((outputs.main / "manifest.json").read_text())
    assert run_cli("describe", outputs.main, "--json") == 0
    d = json.loads(capsys.readouterr().out)
    assert d["counts"] == {k: manifest[k] for k in ("rows_read", "rows_written",
                                                    "rows_rejected", "rows_flagged")}
    assert d["parts"]["files"] == len(manifest["parts"]) == 3
    assert d["parts"]["rows"] == 5000 and d["reconciles"] is True
    assert d["cosmology"]["name"] == "planck2018"
    assert d["cosmology"]["parameters"] == manifest["cosmology"]["parameters"]
    assert [a["name"] for a in d["annotators"]] == [a["name"] for a in manifest["annotators"]]
    by_name = {c["name"]: c for c in d["columns"]}
    table = read_output(outputs.main)
    assert list(by_name) == table.column_names
    for spec in manifest["columns_added"]:
        col = by_name[spec["name"]]
        assert (col["unit"], col["ucd"], col["description"], col["origin"]) == \
            (spec["unit"], spec["ucd"], spec["description"], "added")
    assert by_name["z"]["origin"] == "input" and by_name["z"]["type"] == "double"
    flags = {f["reason"]: f["count"] for f in d["flags"]}
    assert flags == manifest["flags"]["counts"]


def test_describe_text(outputs, capsys):
    assert run_cli("describe", outputs.csv) == 0
    out = capsys.readouterr().out
    assert "cosmology planck2018" in out
    assert "rows: read 3002, written 3000, set aside 2" in out
    assert "counts reconcile" in out and "(2 rows)" in out
    assert "comoving_distance_mpc" in out and "pos.distance;phys.cosmology" in out
    assert "annotators: redshift_checks" in out


def test_export_database_with_comments(outputs, tmp_path, capsys):
    target = tmp_path / "cat.duckdb"
    before = folder_digest(outputs.csv)
    assert run_cli("export", outputs.csv, "--duckdb", target) == 0
    assert folder_digest(outputs.csv) == before
    manifest = json.loads((outputs.csv / "manifest.json").read_text())
    table = read_output(outputs.csv)
    con = duckdb.connect(str(target), read_only=True)
    try:
        tables = {r[0] for r in con.execute("SELECT table_name FROM duckdb_tables()").fetchall()}
        assert {"catalogue", "rejected", "provenance", "catalogue_columns"} <= tables
        (n, total), = con.execute(
            "SELECT count(*), sum(luminosity_distance_mpc) FROM catalogue").fetchall()
        assert n == table.num_rows == manifest["rows_written"]
        assert total == pytest.approx(pc.sum(table["luminosity_distance_mpc"]).as_py(),
                                      rel=1e-12)  # summation order differs
        assert con.execute("SELECT count(*) FROM rejected").fetchone()[0] == 2
        comments = dict(con.execute(
            "SELECT column_name, comment FROM duckdb_columns() WHERE table_name = 'catalogue'"
        ).fetchall())
        assert set(comments) == set(table.column_names)
        assert all(comments.values())
        for spec in manifest["columns_added"]:
            text = comments[spec["name"]]
            assert spec["description"].rstrip(".") in text
            if spec["unit"]:
                assert f"Unit: {spec['unit']}." in text
            if spec["ucd"]:
                assert f"UCD: {spec['ucd']}." in text
        (value,), = con.execute(
            "SELECT value FROM provenance WHERE key = 'rows_read'").fetchall()
        assert json.loads(value) == 3002
    finally:
        con.close()
    assert not list(tmp_path.glob(".*tmp*"))
    assert run_cli("export", outputs.csv, "--duckdb", target) == 2
    assert "exists" in capsys.readouterr().err
    assert run_cli("export", outputs.csv, "--duckdb", target, "--overwrite") == 0
