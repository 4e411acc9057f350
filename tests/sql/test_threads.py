"""Statements that call a Python SQL function run on a one-thread DuckDB instance, the others
(native functions included) on the multi-threaded one; both give the same answers
(consistency checks of the routing)."""

from annotator.sql.session import QuerySession, functions_and_tables


def test_names_in_a_statement():
    functions, tables = functions_and_tables(
        "SELECT comoving_distance_mpc(z) FROM catalogue JOIN selection USING (objid)")
    assert "comoving_distance_mpc" in functions
    assert {"catalogue", "selection"} <= tables


def test_python_functions_run_on_one_thread_and_agree(outputs):
    with QuerySession(outputs.main) as s:
        plain = "SELECT sum(comoving_distance_mpc) FROM catalogue"
        native = "SELECT sum(comoving_distance_mpc(z)) FROM catalogue"
        udf = "SELECT sum(_python_comoving_distance_mpc(z)) FROM catalogue"
        assert s._connection_for(plain) is s.con
        assert s._connection_for(native) is s.con  # DuckDB evaluates it on all its threads
        serial = s._connection_for(udf)
        assert serial is not s.con
        assert serial.execute("SELECT current_setting('threads')").fetchall() == [(1,)]
        (stored,), = s.relation(plain).fetchall()
        (computed,), = s.relation(udf).fetchall()
        (natively,), = s.relation(native).fetchall()
        assert abs(computed / stored - 1.0) < 1e-8  # the columns' own accuracy promise
        assert abs(natively / stored - 1.0) < 1e-8
        # the one-thread instance is as read-only as the other (configuration locked)
        assert serial.execute("SELECT current_setting('enable_external_access')"
                              ).fetchall() == [(False,)]


def test_a_selection_that_calls_a_function_is_routed_too(outputs):
    with QuerySession(outputs.main) as s:
        name = "redshift_slice"
        s.use_selection(name, {"zmin": 0.1, "zmax": 0.5})
        assert s._connection_for("SELECT count(*) FROM selection") is s.con  # no function
        s._selection_text = "SELECT * FROM catalogue WHERE comoving_distance_mpc(z) < 1000"
        assert s._connection_for("SELECT count(*) FROM selection") is s.con  # native
        s._selection_text = ("SELECT * FROM catalogue "
                             "WHERE _python_comoving_distance_mpc(z) < 1000")
        assert s._connection_for("SELECT count(*) FROM selection") is not s.con
