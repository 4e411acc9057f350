"""`annotator query`: results agree with pyarrow/pandas on the same files, SQL functions agree
with the annotated columns, with closed forms and with astropy; streaming output formats."""

from __future__ import annotations

import io
import json
import math

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

from annotator.errors import ConfigError, OutputError
from annotator.sql import QueryError
from annotator.sql.session import QuerySession

from _sql_helpers import read_output, run_cli
from annotator_plugins.sql_functions import RTOL

FORWARD = ("comoving_distance_mpc", "transverse_comoving_distance_mpc",
           "angular_diameter_distance_mpc", "luminosity_distance_mpc", "distance_modulus_mag",
           "lookback_time_gyr", "age_at_emission_gyr", "recession_velocity_now_c",
           "recession_velocity_at_emission_c", "horizon_crossing_age_gyr",
           "signal_arrival_age_gyr")


def _one(session, sql):
    return session.relation(sql).fetchall()


@pytest.fixture(scope="module")
def planck(outputs):
    with QuerySession(outputs.main) as s:
        yield s


@pytest.fixture(scope="module")
def frame(outputs):
    return read_output(outputs.main).to_pandas()


# ------------------------------------------------------------ counts and aggregates
def test_counts_and_aggregates_agree_with_pandas(planck, frame):
    # Reference: pandas over the same part files read by pyarrow (common practice).
    n, mean_z, sum_dc, n_null = _one(planck, """
        SELECT count(*), avg(z), sum(comoving_distance_mpc),
               count(*) FILTER (WHERE comoving_distance_mpc IS NULL) FROM catalogue""")[0]
    assert n == len(frame) == 5000
    assert mean_z == pytest.approx(frame["z"].mean(), rel=1e-12)
    assert sum_dc == pytest.approx(frame["comoving_distance_mpc"].sum(), rel=1e-12)
    assert n_null == frame["comoving_distance_mpc"].isna().sum() == 5  # 3 null z, 2 negative
    by_flag = dict(_one(planck, "SELECT annotation_flags, count(*) FROM catalogue GROUP BY 1"))
    assert by_flag == frame["annotation_flags"].value_counts().to_dict()
    reach = dict(_one(planck, "SELECT reachable, count(*) FROM catalogue GROUP BY 1"))
    expected = frame["reachable"].value_counts(dropna=False)
    assert reach[True] == expected[True] and reach[False] == expected[False]
    assert reach[None] == frame["reachable"].isna().sum()


def test_rejected_view_counts_reconcile_with_the_manifest(outputs):
    manifest = json.loads((outputs.csv / "manifest.json").read_text())
    with QuerySession(outputs.csv) as s:
        (rejected,), = _one(s, "SELECT count(*) FROM rejected")
        (written,), = _one(s, "SELECT count(*) FROM catalogue")
        rows = sorted(r for (r,) in _one(s, "SELECT row FROM rejected"))
    assert (written, rejected) == (manifest["rows_written"], manifest["rows_rejected"]) == (3000, 2)
    assert written + rejected == manifest["rows_read"]
    assert rows == [11, 21]  # the two bad CSV lines (data lines 11 and 21 after the header)


def test_rejected_is_an_empty_view_with_its_schema_when_nothing_was_set_aside(planck):
    assert _one(planck, "SELECT count(*) FROM rejected") == [(0,)]
    described = _one(planck, "DESCRIBE rejected")
    assert [(r[0], r[1]) for r in described] == [("source", "VARCHAR"), ("row", "BIGINT"),
                                                 ("reason", "VARCHAR"), ("raw", "VARCHAR")]


def test_provenance_and_columns_tables(planck, outputs):
    manifest = json.loads((outputs.main / "manifest.json").read_text())
    (value,), = _one(planck, "SELECT value FROM provenance WHERE key = 'rows_read'")
    assert json.loads(value) == manifest["rows_read"]
    (cosmo,), = _one(planck, "SELECT value FROM provenance WHERE key = 'cosmology'")
    assert json.loads(cosmo)["parameters"] == manifest["cosmology"]["parameters"]
    units = dict(_one(planck, "SELECT name, unit FROM catalogue_columns"))
    for col in manifest["columns_added"]:
        assert units[col["name"]] == col["unit"]


# ------------------------------------------------------------ SQL functions
def test_sql_functions_agree_with_the_annotated_columns(planck):
    # The SQL functions and the annotators both use the cosmology recorded in the manifest;
    # values must agree to the interpolation's rounding (the annotator derives D_A and D_L
    # from D_M, the function reads its own table), NULL exactly where the column is NULL.
    for name in FORWARD:
        nulls, infs, worst, n = _one(planck, f"""
            SELECT count(*) FILTER (WHERE ({name} IS NULL) <> ({name}(z) IS NULL)),
                   count(*) FILTER (WHERE isinf({name}) AND {name}(z) <> {name}),
                   max(abs({name}(z) - {name}) / greatest(abs({name}), 1e-300))
                       FILTER (WHERE isfinite({name})),
                   count(*) FILTER (WHERE {name} IS NOT NULL)
            FROM catalogue""")[0]
        assert (nulls, infs) == (0, 0), name
        assert n > 0 and worst < 1e-9, name
    mismatched, n = _one(planck, """
        SELECT count(*) FILTER (WHERE reachable IS DISTINCT FROM reachable(z)),
               count(*) FILTER (WHERE reachable IS NOT NULL) FROM catalogue""")[0]
    assert mismatched == 0 and n == 4995


def test_sql_functions_agree_with_astropy_planck18(planck):
    # Reference library: astropy.cosmology.Planck18 (Planck Collaboration 2020, A&A 641, A6,
    # Table 2 "TT,TE,EE+lowE+lensing+BAO"), the same parameters as our planck2018 preset.
    astropy_cosmology = pytest.importorskip("astropy.cosmology")
    P = astropy_cosmology.Planck18
    z = np.array([0.05, 0.3, 1.0, 2.5, 6.0])
    values = ", ".join(f"({float(v)!r})" for v in z)
    rows = _one(planck, f"""
        SELECT comoving_distance_mpc(v), luminosity_distance_mpc(v),
               angular_diameter_distance_mpc(v), distance_modulus_mag(v),
               lookback_time_gyr(v), age_at_emission_gyr(v), comoving_volume_mpc3(v),
               differential_comoving_volume_mpc3_sr(v), hubble_parameter_km_s_mpc(v)
        FROM (VALUES {values}) t(v) ORDER BY v""")
    got = np.array(rows, dtype=float)
    refs = [P.comoving_distance(z).value, P.luminosity_distance(z).value,
            P.angular_diameter_distance(z).value, P.distmod(z).value,
            P.lookback_time(z).value, P.age(z).value, P.comoving_volume(z).value,
            P.differential_comoving_volume(z).value, P.H(z).value]
    # held to what is achieved (measured worst 1e-10 relative at these redshifts), not to
    # the 1e-6 promise: a wrong constant in the engine would show here
    for i, ref in enumerate(refs):
        np.testing.assert_allclose(got[:, i], ref, rtol=1e-9)


def test_inverse_functions_round_trip(planck):
    # Inverses must undo the forward functions (a consistency check: f^-1(f(z)) = z), to
    # the engine's 1e-8 promise (measured worst 8e-10, redshift_at_age).
    rows = _one(planck, """
        SELECT z, redshift_at_comoving_distance(comoving_distance_mpc(z)),
               redshift_at_lookback_time(lookback_time_gyr(z)),
               redshift_at_age(age_at_emission_gyr(z))
        FROM catalogue WHERE z > 0.001 AND z < 10""")
    assert len(rows) > 4900
    z = np.array(rows, dtype=float)
    for i in (1, 2, 3):
        np.testing.assert_allclose(z[:, i], z[:, 0], rtol=1e-8)


def test_functions_use_the_cosmology_recorded_in_the_manifest(outputs):
    # Einstein-de Sitter (flat, matter only, no radiation): D_C = 2 c/H0 (1 - 1/sqrt(1+z))
    # and t(z) = 2/(3 H0) (1+z)^(-3/2) (Hogg 1999, astro-ph/9905116, eq. 30 and sect. 10
    # for Omega_M = 1).
    # Constants: c exact (SI 2019); 1/H0 in Gyr from the parsec of IAU 2015 Resolution B2
    # (648000/pi au, au of IAU 2012 Resolution B2) and the Julian year (365.25 d).
    c_km_s = 299_792.458
    h0 = 70.0
    mpc_km = 149_597_870_700.0 * 648_000.0 / math.pi * 1e3
    hubble_time_gyr = mpc_km / h0 / (365.25 * 86400.0 * 1e9)
    with QuerySession(outputs.eds) as s:
        rows = _one(s, "SELECT v, comoving_distance_mpc(v), age_at_emission_gyr(v), "
                       "reachable(v) FROM (VALUES (0.5), (1.0), (3.0)) t(v) ORDER BY v")
        cols = _one(s, "SELECT z, comoving_distance_mpc, comoving_distance_mpc(z) FROM "
                       "catalogue WHERE z > 0 LIMIT 50")
    for z, dc, age, reach in rows:
        z = float(z)  # a DECIMAL literal in SQL
        assert dc == pytest.approx(2 * c_km_s / h0 * (1 - 1 / math.sqrt(1 + z)), rel=1e-9)
        assert age == pytest.approx(2 / 3 * hubble_time_gyr * (1 + z) ** -1.5, rel=1e-9)
        assert reach is True  # no event horizon in a decelerating universe
    for z, col, fn in cols:
        assert fn == pytest.approx(col, rel=1e-12)
        assert col == pytest.approx(2 * c_km_s / h0 * (1 - 1 / math.sqrt(1 + z)), rel=1e-9)


def test_functions_take_null_nan_and_bad_redshifts(planck):
    rows = _one(planck, "SELECT comoving_distance_mpc(v), reachable(v) FROM "
                        "(VALUES (NULL::DOUBLE), ('nan'::DOUBLE), (-0.5), ('inf'::DOUBLE)) t(v)")
    assert rows == [(None, None)] * 4
    # integers and decimals are cast to DOUBLE
    (a, b), = _one(planck, "SELECT comoving_distance_mpc(1), comoving_distance_mpc(1.0)")
    assert a == b > 0


# ------------------------------------------------------------ output formats
def test_csv_and_json_stream_to_stdout(outputs, frame, capsys):
    sql = "SELECT objid, z, luminosity_distance_mpc FROM catalogue ORDER BY objid"
    assert run_cli("query", outputs.main, sql, "--format", "csv") == 0
    got = pd.read_csv(io.StringIO(capsys.readouterr().out))
    ref = frame.sort_values("objid")[["objid", "z", "luminosity_distance_mpc"]]
    assert len(got) == 5000
    np.testing.assert_array_equal(got["objid"], ref["objid"])
    np.testing.assert_allclose(got["luminosity_distance_mpc"], ref["luminosity_distance_mpc"],
                               rtol=1e-12)
    assert run_cli("query", outputs.main, sql, "--format", "json") == 0
    lines = capsys.readouterr().out.splitlines()
    assert len(lines) == 5000
    recs = [json.loads(line) for line in lines]
    assert recs[0] == {"objid": 1_000_000, "z": None, "luminosity_distance_mpc": None}
    assert recs[10]["luminosity_distance_mpc"] == pytest.approx(
        ref["luminosity_distance_mpc"].iloc[10], rel=1e-12)


def test_table_format_is_bounded_and_says_so(outputs, capsys):
    assert run_cli("query", outputs.main, "SELECT objid, z FROM catalogue ORDER BY objid",
                   "--max-rows", 5) == 0
    out = capsys.readouterr().out.splitlines()
    assert out[0].split() == ["objid", "z"]
    assert len(out) == 2 + 5 + 1
    assert out[2].split() == ["1000000", "NULL"]
    assert "first 5 rows shown" in out[-1]
    assert run_cli("query", outputs.main, "SELECT 1 AS one") == 0
    assert capsys.readouterr().out.splitlines()[-1] == "result: 1 row"


@pytest.mark.parametrize("suffix", [".parquet", ".csv", ".json"])
def test_to_file_writes_the_whole_result_with_copy(outputs, frame, tmp_path, suffix, capsys):
    target = tmp_path / f"far{suffix}"
    sql = "SELECT objid, z, comoving_distance_mpc(z) AS dc FROM catalogue WHERE z > 2"
    assert run_cli("query", outputs.main, sql, "--to", target) == 0
    assert "wrote" in capsys.readouterr().err
    if suffix == ".parquet":
        got = pq.read_table(target).to_pandas()
    elif suffix == ".csv":
        got = pd.read_csv(target)
    else:
        got = pd.read_json(target, lines=True)
    ref = frame[frame["z"] > 2]
    assert len(got) == len(ref) > 0
    # the SQL function is DuckDB's native form, held to RTOL of the engine that wrote the column
    np.testing.assert_allclose(np.sort(got["dc"]), np.sort(ref["comoving_distance_mpc"]),
                               rtol=RTOL)
    assert not list(tmp_path.glob(".*.tmp"))
    # refuses to replace a file unless asked
    assert run_cli("query", outputs.main, sql, "--to", target) == 2
    assert "exists" in capsys.readouterr().err
    assert run_cli("query", outputs.main, sql, "--to", target, "--overwrite") == 0


def test_format_choices_are_checked(outputs, tmp_path, capsys):
    assert run_cli("query", outputs.main, "SELECT 1", "--format", "parquet") == 2
    assert "needs --to" in capsys.readouterr().err
    assert run_cli("query", outputs.main, "SELECT 1", "--to", tmp_path / "x.txt") == 2
    assert "cannot tell the format" in capsys.readouterr().err


# ------------------------------------------------------------ attach
def test_attached_outputs_join_and_warn_about_their_cosmology(outputs, capsys):
    sql = ("SELECT count(*) FROM catalogue a JOIN eds.catalogue b USING (objid) "
           "WHERE a.comoving_distance_mpc < b.comoving_distance_mpc")
    assert run_cli("query", outputs.main, sql, "--attach", f"eds={outputs.eds}",
                   "--format", "csv") == 0
    captured = capsys.readouterr()
    # EdS distances are shorter than Lambda-CDM ones at every z > 0 (Hogg 1999, fig. 1),
    # so no row qualifies; the join itself must still see all 5000 rows.
    assert captured.out.splitlines()[1] == "0"
    assert "einstein-de-sitter" in captured.err and "planck2018" in captured.err
    with QuerySession(outputs.main, attach={"eds": outputs.eds}) as s:
        assert _one(s, "SELECT count(*) FROM catalogue JOIN eds.catalogue USING (objid)") \
            == [(5000,)]
    with pytest.raises(ConfigError, match="--attach main"):
        QuerySession(outputs.main, attach={"main": outputs.eds})


def test_read_paths_allow_joining_another_file(outputs, tmp_path):
    targets = tmp_path / "targets.csv"
    targets.write_text("objid,priority\n1000005,1\n1000006,2\n")
    with QuerySession(outputs.main, read_paths=[targets]) as s:
        rows = _one(s, f"SELECT objid, priority FROM catalogue JOIN read_csv('{targets}') "
                       f"USING (objid) ORDER BY objid")
    assert rows == [(1000005, 1), (1000006, 2)]


def test_a_missing_folder_or_manifest_is_a_clear_error(tmp_path):
    with pytest.raises(OutputError, match="no such output folder"):
        QuerySession(tmp_path / "nope")
    with pytest.raises(OutputError, match="manifest.json"):
        QuerySession(tmp_path)


def test_errors_inside_a_query_are_query_errors(planck):
    with pytest.raises(QueryError, match='column "zz" not found'):
        planck.relation("SELECT zz FROM catalogue")


def test_stdout_formats_handle_other_sql_types(outputs, capsys):
    assert run_cli("query", outputs.main, "SELECT 1.5 AS x, [1, 2] AS l, 'nan'::DOUBLE AS n",
                   "--format", "json") == 0
    assert json.loads(capsys.readouterr().out) == {"x": 1.5, "l": [1, 2], "n": None}
    assert run_cli("query", outputs.main, "SELECT [1, 2] AS l", "--format", "csv") == 2
    err = capsys.readouterr().err
    assert "cannot be written as CSV" in err and err.count("\n") == 1


def test_list_functions_names_every_function_with_its_unit(outputs, capsys):
    assert run_cli("query", outputs.main, "--list-functions") == 0
    out = capsys.readouterr().out
    assert "cosmology planck2018" in out
    for name in FORWARD + ("comoving_volume_mpc3", "reachable"):
        assert f"\n{name}(z) -> " in out
    for name, arg in (("redshift_at_comoving_distance", "d_mpc"),
                      ("redshift_at_lookback_time", "t_gyr"), ("redshift_at_age", "t_gyr")):
        assert f"\n{name}({arg}) -> DOUBLE" in out
    assert "comoving_distance_mpc(z) -> DOUBLE [Mpc]" in out


def test_explain_describe_and_summarize_are_allowed(outputs, capsys):
    assert run_cli("query", outputs.main, "EXPLAIN SELECT count(*) FROM catalogue "
                   "WHERE reachable(z)") == 0
    out = capsys.readouterr().out
    # reachable is native SQL: the plan shows it expanded, a comparison pushed into the scan
    assert out.startswith("physical_plan:\n") and "(z < " in out
    assert run_cli("query", outputs.main, "SUMMARIZE SELECT z FROM catalogue",
                   "--format", "json") == 0
    (summary,) = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    assert summary["column_name"] == "z" and summary["null_percentage"] is not None
