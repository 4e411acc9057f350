"""SQL functions of the recorded cosmology: native (DuckDB's own arithmetic) against Python UDFs.

Builds (once, cached in benchmarks/_data) an annotated output of ``--rows`` rows with the real
pipeline, then times, in the same run and on the same files:

* ``sum(comoving_distance_mpc)``      the annotated column read directly (the floor);
* the Python (Arrow) UDF on one DuckDB thread (the previous code) and on all of them (the
  code before that);
* every SQL function of the cosmology in its native form (``annotator/sql/native.py``:
  piecewise polynomials in a DuckDB macro, on all threads), the inverses over the column they
  invert, and a COPY of a native result to Parquet;
* ``sum(dc_row_at_a_time(z))``        the same engine called row by row from a plain Python
  UDF (the competing approach), on a slice of ``--row-udf-rows`` rows;
* the engine alone on an in-memory numpy array.

It prints the time to fit the native forms, their agreement with the stored column, and a
NATIVE line: comoving_distance_mpc's rate against the one-thread Python UDF and the slowest
native function against the 20 M rows/s target.

Run: ``.venv/bin/python benchmarks/bench_sql.py --rows 10000000`` (default 1,000,000).
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
from _common import DATA, synthetic_catalogue  # noqa: E402


def annotated_output(rows: int) -> Path:
    """An annotated output of ``rows`` rows (made with the real pipeline, then cached)."""
    from annotator.config import load_job
    from annotator.runner import run_job

    out = DATA / f"sql_output_{rows}"
    if (out / "manifest.json").is_file():
        return out
    cat = synthetic_catalogue(DATA / f"sql_catalogue_{rows}.parquet", rows)
    job = load_job(None, inputs=[str(cat)], output_dir=str(out), chunk_rows=1_000_000,
                   overwrite=True)
    t = time.perf_counter()
    run_job(job)
    print(f"(annotated {rows:,} rows in {time.perf_counter() - t:.1f} s, cached in {out})",
          file=sys.stderr)
    return out


def best_of(repeats: int, fn) -> tuple[float, object]:
    best, value = float("inf"), None
    for _ in range(repeats):
        t = time.perf_counter()
        value = fn()
        best = min(best, time.perf_counter() - t)
    return best, value


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--row-udf-rows", type=int, default=100_000,
                    help="rows given to the row-at-a-time UDF (it is slow)")
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args(argv)

    from annotator.sql.session import QuerySession

    folder = annotated_output(args.rows)
    results = []
    tmp = Path(tempfile.mkdtemp(prefix="bench-sql-"))
    try:
        with QuerySession(folder, write_to=tmp / "copy.parquet") as s:
            cosmo = s.output.cosmology
            (n,), = s.relation("SELECT count(*) FROM catalogue").fetchall()

            def q(sql):
                return lambda: s.relation(sql).fetchall()[0][0]

            python_dc = s.functions["comoving_distance_mpc"][0].python_name
            cases = [
                ("column read directly: sum(comoving_distance_mpc)",
                 q("SELECT sum(comoving_distance_mpc) FROM catalogue"), n),
                ("Python UDF on one thread (previous code): sum(comoving_distance_mpc(z))",
                 q(f"SELECT sum({python_dc}(z)) FROM catalogue"), n),
            ]
            # the code before that: the same Python UDF called from all of DuckDB's threads
            from annotator.sql.session import arrow_udf

            fn_dc = s.functions["comoving_distance_mpc"][0]
            s.con.create_function("dc_on_all_threads", arrow_udf(fn_dc), ["DOUBLE"], "DOUBLE",
                                  type="arrow", null_handling="special", side_effects=False)
            cases.append(("Python UDF on all DuckDB threads (the code before)",
                          q("SELECT sum(dc_on_all_threads(z)) FROM catalogue"), n))
            # every function of the cosmology, native (DuckDB evaluates it on all threads);
            # the inverses take the column they invert
            argument = {"redshift_at_comoving_distance": "comoving_distance_mpc",
                        "redshift_at_lookback_time": "lookback_time_gyr",
                        "redshift_at_age": "age_at_emission_gyr"}
            from annotator.sql import native

            fit_s = {}  # the fit and check alone, per function (what a first use costs)
            for name in sorted(s.functions):
                fn = s.functions[name][0]
                if fn.approximation is not None:
                    fit_s[name] = best_of(args.repeats,
                                          lambda fn=fn: native.fit(fn.function,
                                                                   fn.approximation))[0]
                s.relation(f"SELECT {name}(0.5)").fetchall()  # the session fits on first use
                arg = argument.get(name, "z")
                agg = "count_if" if fn.return_type.upper() == "BOOLEAN" else "sum"
                cases.append((f"native: {agg}({name}({arg}))",
                              q(f"SELECT {agg}({name}({arg})) FROM catalogue"), n))
            cases.append(("native + COPY to Parquet: objid, luminosity_distance_mpc(z)",
                          lambda: s.copy_to("SELECT objid, luminosity_distance_mpc(z) AS dl "
                                            "FROM catalogue", "parquet", overwrite=True), n))
            (stored, natively, python), = s.relation(
                f"SELECT sum(comoving_distance_mpc), sum(comoving_distance_mpc(z)), "
                f"sum({python_dc}(z)) FROM catalogue").fetchall()
            agreement = (abs(natively / stored - 1), abs(python / stored - 1))
            segments = {k: (f.fitted_segments, len(f.segments)) for k, f in s.fitted.items()}
            for label, fn, rows in cases:
                secs, value = best_of(args.repeats, fn)
                results.append({"case": label, "rows": rows, "seconds": secs,
                                "rows_per_second": rows / secs, "value": value})

            # the competing approach: a row-at-a-time Python UDF calling the same engine
            def one(z):
                return float(cosmo.comoving_distance_mpc(np.array([z]))[0])

            s.con.create_function("dc_row_at_a_time", one, ["DOUBLE"], "DOUBLE",
                                  type="native", side_effects=False)
            m = min(args.row_udf_rows, n)
            secs, value = best_of(1, q(f"SELECT sum(dc_row_at_a_time(z)) FROM "
                                       f"(SELECT z FROM catalogue LIMIT {m})"))
            results.append({"case": "row-at-a-time Python UDF: sum(dc_row_at_a_time(z))",
                            "rows": m, "seconds": secs, "rows_per_second": m / secs,
                            "value": value})
            secs_udf_same, value_udf_same = best_of(args.repeats, q(
                f"SELECT sum(comoving_distance_mpc(z)) FROM (SELECT z FROM catalogue LIMIT {m})"))
            results.append({"case": f"native on the same {m:,} rows", "rows": m,
                            "seconds": secs_udf_same, "rows_per_second": m / secs_udf_same,
                            "value": value_udf_same})

            z = np.concatenate([
                b.column(0).to_numpy(zero_copy_only=False)
                for b in s.reader("SELECT z FROM catalogue")])
        secs, value = best_of(args.repeats, lambda: np.nansum(cosmo.comoving_distance_mpc(z)))
        results.append({"case": "engine alone on an in-memory array (no SQL)", "rows": len(z),
                        "seconds": secs, "rows_per_second": len(z) / secs, "value": value})
    finally:
        shutil.rmtree(tmp, ignore_errors=True)

    if args.json:
        print(json.dumps(results, indent=2, default=float))
        return 0
    load = ", ".join(f"{v:.1f}" for v in os.getloadavg())
    print(f"{args.rows:,}-row annotated output, cosmology {cosmo.name}; best of "
          f"{args.repeats}; {os.cpu_count()} cores, load average {load}")
    for r in results:
        print(f"  {r['case']:<78} {r['rows']:>11,} rows {r['seconds']:>8.3f} s "
              f"{r['rows_per_second'] / 1e6:>9.2f} M rows/s")
    natives = [r for r in results if r["case"].startswith("native: ")]
    slowest = min(natives, key=lambda r: r["rows_per_second"])
    one_thread = next(r for r in results if r["case"].startswith("Python UDF on one thread"))
    dc = next(r for r in natives if "comoving_distance_mpc(z)" in r["case"])
    print(f"fitting and checking the native form (once per session, when a statement first "
          f"uses the function): median {1e3 * float(np.median(list(fit_s.values()))):.1f} ms, "
          f"max {1e3 * max(fit_s.values()):.1f} ms ({max(fit_s, key=fit_s.get)}), "
          f"{1e3 * sum(fit_s.values()):.0f} ms for all {len(fit_s)}")
    print("segments with a polynomial / all (the rest: the engine answers): "
          + ", ".join(f"{k} {a}/{b}" for k, (a, b) in sorted(segments.items())))
    print(f"sum of comoving_distance_mpc(z) against the stored column: native "
          f"{agreement[0]:.1e}, Python {agreement[1]:.1e} (relative)")
    print(f"NATIVE: comoving_distance_mpc(z) {dc['rows_per_second'] / 1e6:.1f} M rows/s, "
          f"{dc['rows_per_second'] / one_thread['rows_per_second']:.2f}x the Python UDF on one "
          f"thread; slowest native function {slowest['case'][8:]} "
          f"{slowest['rows_per_second'] / 1e6:.1f} M rows/s (target >= 20 M rows/s)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
