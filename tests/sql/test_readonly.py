"""A query never modifies the output folder, whatever the SQL tries; errors are one line."""

from __future__ import annotations

import duckdb
import pytest
from _sql_helpers import folder_digest, run_cli

from annotator.sql import QueryError
from annotator.sql.session import QuerySession, read_only_statement

# Every way we know to write with DuckDB SQL (common practice: the statement kinds of the
# DuckDB grammar that touch files or tables), each aimed at the output folder {d}.
ATTEMPTS = [
    "COPY (SELECT 1) TO '{d}/evil.csv'",
    "COPY catalogue TO '{d}/part-00000-000000.parquet' (FORMAT parquet)",
    "WITH x AS (COPY (SELECT 1) TO '{d}/evil.csv') SELECT 1",
    "SELECT * FROM (WITH x AS (COPY (SELECT 1) TO '{d}/evil.csv') SELECT 2)",
    "EXPLAIN ANALYZE COPY (SELECT 1) TO '{d}/evil.csv'",
    "EXPLAIN ANALYZE CREATE TABLE t AS SELECT 1",
    "/* hidden */ EXPLAIN ANALYZE COPY (SELECT 1) TO '{d}/evil.csv'",
    "CREATE TABLE t AS SELECT * FROM catalogue",
    "CREATE VIEW v AS SELECT 1",
    "DELETE FROM provenance",
    "INSERT INTO provenance VALUES ('a', 'b')",
    "UPDATE provenance SET value = 'x'",
    "WITH x AS (DELETE FROM provenance RETURNING *) SELECT * FROM x",
    "WITH x AS (INSERT INTO provenance VALUES ('a', 'b') RETURNING *) SELECT * FROM x",
    "DROP VIEW catalogue",
    "ATTACH '{d}/extra.duckdb' AS extra",
    "EXPORT DATABASE '{d}/dump'",
    "SET enable_external_access = true",
    "RESET lock_configuration",
    "PRAGMA enable_profiling",
    "INSTALL httpfs",
    "LOAD httpfs",
    "CHECKPOINT",
    "CALL pragma_version()",
    "SELECT 1; COPY (SELECT 1) TO '{d}/evil.csv'",
    "SELECT count(*) FROM catalogue; DELETE FROM provenance",
]


@pytest.mark.parametrize("template", ATTEMPTS)
def test_writing_statements_are_refused_by_the_checker(template, outputs):
    with pytest.raises(QueryError):
        read_only_statement(template.format(d=outputs.main))


def test_no_attempt_changes_the_output_folder(outputs, capsys, tmp_path):
    d = outputs.main
    before = folder_digest(d)
    for template in ATTEMPTS:
        assert run_cli("query", d, template.format(d=d)) == 2, template
        err = capsys.readouterr().err
        assert err.startswith("annotator: error: SQL:") and err.count("\n") == 1, err
        assert "Traceback" not in err
    # --to pointing into the folder, and export into it, are refused as well
    assert run_cli("query", d, "SELECT 1 AS a", "--to", d / "result.parquet") == 2
    assert "inside the output folder" in capsys.readouterr().err
    assert run_cli("query", d, "SELECT 1 AS a", "--to", d / "rejected" / "r.csv") == 2
    assert run_cli("export", d, "--duckdb", d / "copy.duckdb") == 2
    assert "never modified" in capsys.readouterr().err
    # ordinary queries, functions, selections and results written elsewhere leave it alone
    assert run_cli("query", d, "SELECT count(*), avg(comoving_distance_mpc(z)) FROM catalogue") \
        == 0
    assert run_cli("query", d, "--selection", "reachable", "--format", "csv") == 0
    assert run_cli("query", d, "SELECT * FROM catalogue", "--to", tmp_path / "all.parquet") == 0
    assert folder_digest(d) == before


def test_file_access_is_confined_even_without_the_checker(outputs, tmp_path):
    # Wall 4 alone (bypassing the statement check through the raw connection): reading or
    # writing outside the queried folders and the --to file is a permission error.
    outside = tmp_path / "outside.csv"
    outside.write_text("a\n1\n")
    with QuerySession(outputs.main) as s:
        with pytest.raises(duckdb.Error, match="(?i)permission|disabled"):
            s.con.execute(f"SELECT * FROM read_csv('{outside}')").fetchall()
        with pytest.raises(duckdb.Error, match="(?i)permission|disabled"):
            s.con.execute(f"COPY (SELECT 1) TO '{tmp_path / 'w.csv'}'")
        with pytest.raises(duckdb.Error, match="(?i)locked"):
            s.con.execute("SET enable_external_access = true")
        (tmp,), = s.con.execute("SELECT current_setting('temp_directory')").fetchall()
        assert "annotator-sql-" in tmp  # spills go to a private folder, not the cwd
    assert not (tmp_path / "w.csv").exists()


def test_sql_errors_are_one_clear_line(outputs, capsys):
    assert run_cli("query", outputs.main, "SELECT no_such_column FROM catalogue") == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "Traceback" not in err
    assert 'no_such_column' in err and "not found" in err
    assert run_cli("query", outputs.main, "SELEC 1") == 2
    err = capsys.readouterr().err
    assert err.startswith("annotator: error: SQL: Parser Error") and err.count("\n") == 1
    assert run_cli("query", outputs.main, "SELECT comoving_distance_mpc('far')") == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "'far'" in err
    assert run_cli("query", outputs.main) == 2
    assert "give a SQL statement" in capsys.readouterr().err
