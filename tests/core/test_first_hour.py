"""What a newcomer meets in the first hour: options that are honest, messages that say why.

Consistency checks of the command line against its own documented contract (issue 16).
"""

from __future__ import annotations

import json

import pytest

from annotator.cli import build_parser, main


def _run(capsys, *argv):
    rc = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return rc, out, err


@pytest.mark.parametrize("option", [["--workers", "2"], ["--scheduler", "tcp://127.0.0.1:1"]])
def test_dask_options_without_the_dask_engine_are_refused(capsys, tmp_path, catalogue_parquet,
                                                          option):
    rc, out, err = _run(capsys, "run", catalogue_parquet, "--out", tmp_path / "o", *option)
    assert rc == 2
    assert err.count("\n") == 1 and f"{option[0]}: only used with --engine dask" in err
    assert not (tmp_path / "o").exists()


def test_engine_has_help_text():
    text = build_parser(only="run")._subparsers._group_actions[0].choices["run"].format_help()
    assert "--engine {local,dask}" in text and "docs/dask.md" in text


def test_every_run_says_which_annotators_did_not_apply_and_why(capsys, tmp_path,
                                                               catalogue_parquet):
    rc, _, err = _run(capsys, "run", catalogue_parquet, "--out", tmp_path / "o", "--quiet")
    assert rc == 0
    assert "annotator: kcorrection not applied: no [bands] tables in the job" in err
    assert "annotator: redshift_frames not applied: no [columns] redshift_frame" in err


def test_disabled_annotator_named_with_the_key_that_disabled_it(capsys, tmp_path,
                                                                catalogue_parquet):
    job = tmp_path / "job.toml"
    job.write_text(f'[input]\npaths = ["{catalogue_parquet}"]\n[annotators]\nvelocities = false\n')
    rc, _, err = _run(capsys, "run", "--config", job, "--out", tmp_path / "o", "--dry-run")
    assert rc == 0
    assert "velocities not applied: disabled ([annotators] velocities = false)" in err


def test_an_enabled_annotator_that_cannot_apply_says_why(capsys, tmp_path, catalogue_parquet):
    job = tmp_path / "job.toml"
    job.write_text(f'[input]\npaths = ["{catalogue_parquet}"]\n[annotators]\nkcorrection = true\n')
    rc, _, err = _run(capsys, "run", "--config", job, "--out", tmp_path / "o")
    assert rc == 2
    assert "[annotators].kcorrection: enabled, but not applied: no [bands] tables" in err


def test_plugins_point_to_where_job_dependent_columns_are_listed(capsys):
    rc, out, _ = _run(capsys, "plugins")
    assert rc == 0
    assert "see its documentation" not in out
    assert "--dry-run` lists them; see docs/kcorrection.md" in out
    rc, out, _ = _run(capsys, "plugins", "--json")
    records = {r["name"]: r for r in json.loads(out)}
    assert records["kcorrection"]["documentation"] == "docs/kcorrection.md"
    assert "redshift_negative" in records["redshift_checks"]["columns_note"]


@pytest.mark.parametrize("command, option", [("serve", "--data-root PATH"),
                                             ("export", "--duckdb FILE")])
def test_required_options_are_shown_as_required(command, option):
    parser = build_parser(only=command)
    usage = parser._subparsers._group_actions[0].choices[command].format_usage()
    assert option in usage and f"[{option}" not in usage


@pytest.fixture(scope="module")
def annotated(tmp_path_factory):
    from catalogue_factory import make_catalogue
    import pyarrow.parquet as pq

    base = tmp_path_factory.mktemp("first_hour")
    pq.write_table(make_catalogue(400), base / "c.parquet")
    assert main(["run", str(base / "c.parquet"), "--out", str(base / "out"), "--quiet"]) == 0
    return base / "out"


def test_report_refuses_a_pdf_and_an_existing_file_without_overwrite(capsys, tmp_path,
                                                                     annotated):
    rc, _, err = _run(capsys, "report", annotated, "--to", tmp_path / "r.pdf")
    assert rc == 2 and "HTML page; name it .html" in err and not (tmp_path / "r.pdf").exists()
    target = tmp_path / "r.html"
    target.write_text("keep me")
    rc, _, err = _run(capsys, "report", annotated, "--to", target, "--sample-rows", "50")
    assert rc == 2 and "exists (add --overwrite" in err and target.read_text() == "keep me"
    rc, _, _ = _run(capsys, "report", annotated, "--to", target, "--sample-rows", "50",
                    "--overwrite")
    assert rc == 0 and target.read_text().startswith("<!DOCTYPE html>")


def test_query_accepts_the_sql_after_the_options(capsys, annotated):
    rc, out, _ = _run(capsys, "query", annotated, "--format", "csv",
                      "SELECT count(*) AS n FROM catalogue")
    assert rc == 0 and out.splitlines()[1] == "400"


def test_query_still_refuses_two_statements_and_unknown_options(capsys, annotated):
    for extra in (["--format", "csv", "SELECT 1", "SELECT 2"], ["--bogus", "SELECT 1"]):
        with pytest.raises(SystemExit) as exc:  # argparse's own one-line error
            main(["query", str(annotated), *extra])
        assert exc.value.code == 2
        assert "unrecognized arguments" in capsys.readouterr().err


@pytest.mark.parametrize("fmt", ["csv", "json"])
def test_query_format_is_identical_on_stdout_and_in_a_file(capsys, tmp_path, annotated, fmt):
    sql = ("SELECT objid, z, annotation_flags, reachable, 'a,b \"c\"' AS s, "
           "'nan'::DOUBLE AS n, NULL AS nothing FROM catalogue ORDER BY objid LIMIT 20")
    main(["query", str(annotated), sql, "--format", fmt])
    stdout = capsys.readouterr().out
    target = tmp_path / f"r.{fmt}"
    assert main(["query", str(annotated), sql, "--to", str(target)]) == 0
    assert target.read_text() == stdout
    if fmt == "json":
        assert json.loads(stdout.splitlines()[0])["n"] is None  # NaN is not JSON


def test_parquet_without_a_file_is_refused_truthfully(capsys, annotated):
    rc, _, err = _run(capsys, "query", annotated, "SELECT 1", "--format", "parquet")
    assert rc == 2 and "terminal" not in err and "--to FILE.parquet" in err


def test_a_folder_mixing_tables_of_different_shapes_names_the_files(capsys, tmp_path,
                                                                    catalogue_parquet):
    import shutil

    folder = tmp_path / "drop"
    (folder / "filters").mkdir(parents=True)
    shutil.copy(catalogue_parquet, folder / "catalogue.parquet")
    for band in ("blue", "red"):
        (folder / "filters" / f"{band}.csv").write_text("wavelength_angstrom,response\n1,0\n")
    rc, _, err = _run(capsys, "run", folder, "--out", tmp_path / "o")
    assert rc == 2 and err.count("\n") == 1
    assert "2 different shapes" in err
    assert "catalogue.parquet [objid, ra, dec, z, … (8 columns)]" in err
    assert "filters/blue.csv, filters/red.csv [wavelength_angstrom, response]" in err
    assert not (tmp_path / "o").exists()
