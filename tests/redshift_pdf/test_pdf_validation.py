"""Bad posteriors are set aside with a flag (point annotations kept); bad configuration stops
the job with one line naming the key; counts reconcile end to end; SQL finds the undecided."""

from __future__ import annotations

import io
import json

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from _pdf_helpers import PLANCK, Z_EH, annotate, col, list_column
from scipy.stats import norm

from annotator.cli import main
from annotator.errors import ConfigError

GRID = np.linspace(0.0, 4.0, 81)
GRID_CFG = {"start": 0.0, "stop": 4.0, "count": 81}
GOOD = norm.pdf(GRID, 1.0, 0.2)
POSTERIOR_COLUMNS = ("reachable_probability", "redshift_p50", "comoving_distance_p16_mpc",
                     "age_at_emission_mean_gyr", "redshift_pdf_secondary_mass")


def _expect_set_aside(out, rows, reason):
    flags = out.column("annotation_flags").to_pylist()
    for r in rows:
        assert reason in flags[r].split(";"), (r, flags[r])
        for name in POSTERIOR_COLUMNS + ("redshift_pdf_modes",):
            assert out.column(name)[r].as_py() is None, (name, r)
        # the point annotations still come from the catalogue redshift
        z = out.column("z")[r].as_py()
        assert out.column("comoving_distance_mpc")[r].as_py() == pytest.approx(
            float(PLANCK.comoving_distance_mpc(z)), rel=1e-12)


def test_every_bad_gridded_posterior_is_set_aside_with_its_flag(tmp_path):
    neg = GOOD.copy()
    neg[30] = -1e-3
    nan = GOOD.copy()
    nan[5] = np.nan
    rows = [GOOD, neg, np.zeros_like(GOOD), nan, [], None, GOOD[:-1], GOOD * 7.0]
    table = pa.table({"z": np.linspace(0.5, 1.2, len(rows)), "pz": list_column(rows)})
    out, flags, _ = annotate(tmp_path, table, {"kind": "gridded", "column": "pz",
                                               "grid": GRID_CFG})
    _expect_set_aside(out, [1], "redshift_pdf_negative")
    _expect_set_aside(out, [2], "redshift_pdf_all_zero")
    _expect_set_aside(out, [3], "redshift_pdf_nan")
    _expect_set_aside(out, [4], "redshift_pdf_empty")
    _expect_set_aside(out, [5], "redshift_pdf_missing")
    _expect_set_aside(out, [6], "redshift_pdf_wrong_length")
    assert flags == {"redshift_pdf_negative": 1, "redshift_pdf_all_zero": 1,
                     "redshift_pdf_nan": 1, "redshift_pdf_empty": 1, "redshift_pdf_missing": 1,
                     "redshift_pdf_wrong_length": 1}
    # unnormalised densities are normalised: row 7 (7 x row 0, both rounded to float32)
    # gives the same answers to float32 precision
    for name in POSTERIOR_COLUMNS:
        assert out.column(name)[7].as_py() == pytest.approx(out.column(name)[0].as_py(),
                                                            rel=3e-7, abs=1e-12)


def test_per_object_grids_and_their_validation(tmp_path):
    g = list(GRID)
    bad_order = g.copy()
    bad_order[10], bad_order[11] = bad_order[11], bad_order[10]
    grids = [g, bad_order, g[::2], g, None]
    pdfs = [GOOD, GOOD, GOOD[::2], GOOD[:40], GOOD]
    table = pa.table({"z": [1.0] * 5, "pz": list_column(pdfs),
                      "zg": list_column(grids, pa.float64())})
    out, flags, _ = annotate(tmp_path, table, {"kind": "gridded", "column": "pz",
                                               "grid_column": "zg"})
    _expect_set_aside(out, [1], "redshift_pdf_grid_not_increasing")
    _expect_set_aside(out, [3], "redshift_pdf_wrong_length")
    _expect_set_aside(out, [4], "redshift_pdf_missing")
    # a coarser grid of the same density: the same answer to its interpolation error
    assert col(out, "redshift_p50")[2] == pytest.approx(1.0, abs=1e-3)
    assert col(out, "redshift_p50")[0] == pytest.approx(1.0, abs=1e-6)
    assert col(out, "reachable_probability")[0] == pytest.approx(
        norm.cdf(Z_EH, 1.0, 0.2), abs=1e-3)  # scipy.stats.norm


def test_bad_samples_and_quantiles_are_set_aside(tmp_path):
    rng = np.random.default_rng(2)
    draws = [rng.normal(1, 0.1, 50), [0.9, np.nan, 1.1], [0.5, -0.1, 0.7], [], None]
    table = pa.table({"z": [1.0] * 5, "s": list_column(draws, pa.float64()),
                      "q1": [0.8, 0.8, np.nan, -0.1, 1.2], "q2": [1.0, 1.0, 1.0, 1.0, 1.0],
                      "q3": [1.2, 1.2, 1.2, 1.2, 1.3]})
    out, flags, _ = annotate(tmp_path, table, {"kind": "samples", "column": "s"})
    _expect_set_aside(out, [1], "redshift_pdf_nan")
    _expect_set_aside(out, [2], "redshift_pdf_negative")
    _expect_set_aside(out, [3], "redshift_pdf_empty")
    _expect_set_aside(out, [4], "redshift_pdf_missing")
    out, flags, _ = annotate(tmp_path, table, {"kind": "quantiles",
                                               "quantile_levels": [16, 50, 84],
                                               "quantile_columns": ["q1", "q2", "q3"]})
    assert col(out, "redshift_p50")[0] == pytest.approx(1.0, abs=1e-9)  # passes through it
    _expect_set_aside(out, [2], "redshift_pdf_nan")
    _expect_set_aside(out, [3], "redshift_pdf_negative")
    _expect_set_aside(out, [4], "redshift_pdf_grid_not_increasing")
    assert flags == {"redshift_pdf_nan": 1, "redshift_pdf_negative": 1,
                     "redshift_pdf_grid_not_increasing": 1}


@pytest.mark.parametrize("cfg, key, words", [
    ({"column": "pz"}, "kind", "expected one of"),
    ({"kind": "gridded", "column": "pz", "grid": [0.0, 1.0, 0.5]}, "grid", "strictly increase"),
    ({"kind": "gridded", "column": "pz", "grid": [-1.0, 1.0]}, "grid", "negative"),
    ({"kind": "gridded", "column": "pz"}, "grid", "exactly one of"),
    ({"kind": "gridded", "column": "nope", "grid": [0.0, 1.0]}, "column", "not in the catalogue"),
    ({"kind": "gridded", "column": "z", "grid": [0.0, 1.0]}, "column", "expected a list"),
    ({"kind": "gridded", "column": "pz", "grid": [0.0, 1.0], "colour": 1}, "colour",
     "unknown key"),
    ({"kind": "gridded", "column": "pz", "grid": {"start": 0, "stop": 2, "count": 1}},
     "grid.count", "integer >= 2"),
    ({"kind": "samples", "column": "pz", "mode_threshold": 2}, "mode_threshold", "[1e-06, 1.0]"),
    ({"kind": "samples", "column": "pz", "list_delimiter": ","}, "list_delimiter", "CSV"),
    ({"kind": "quantiles", "quantile_levels": [50, 16], "quantile_columns": ["z", "z"]},
     "quantile_levels", "strictly increase"),
    ({"kind": "quantiles", "quantile_levels": [16, 50], "quantile_columns": ["z"]},
     "quantile_columns", "one per level"),
    ({"kind": "gridded", "column": "pz", "grid_file": "missing.csv"}, "grid_file",
     "does not exist"),
])
def test_configuration_errors_name_the_key(tmp_path, cfg, key, words):
    table = pa.table({"z": [1.0], "pz": list_column([GOOD])})
    with pytest.raises(ConfigError) as err:
        annotate(tmp_path, table, cfg)
    msg = str(err.value)
    assert f"[redshift_pdf].{key}" in msg and words in msg and "\n" not in msg


def test_grid_from_a_parquet_or_csv_file(tmp_path):
    pq.write_table(pa.table({"z": GRID}), tmp_path / "grid.parquet")
    (tmp_path / "grid.csv").write_text("z\n" + "\n".join(repr(float(x)) for x in GRID) + "\n")
    table = pa.table({"z": [1.0], "pz": list_column([GOOD])})
    ref, _, _ = annotate(tmp_path, table, {"kind": "gridded", "column": "pz",
                                           "grid": GRID_CFG})
    for name in ("grid.parquet", "grid.csv"):
        out, _, _ = annotate(tmp_path, table, {"kind": "gridded", "column": "pz",
                                               "grid_file": name})
        assert out.column("redshift_p84").equals(ref.column("redshift_p84"))


def test_csv_run_counts_reconcile_and_sql_selects_the_undecided(tmp_path, capsys):
    """End to end through the CLI on a CSV with delimited lists: rows_read = rows_written +
    rows_rejected, flag counts equal the bad rows, and the 'undecided' selection returns the
    rows with 0.05 < P < 0.95 (reference: the same filter in pandas, common practice)."""
    centres = np.linspace(1.3, 2.4, 23)
    lines = ["id,z,pz"]
    for i, c in enumerate(centres):
        lines.append(f"{i},{c:.4f}," + ";".join(f"{v:.6g}" for v in norm.pdf(GRID, c, 0.15)))
    lines.append("23,1.0,")  # an empty field: the CSV reader makes it null
    lines.append("24,1.0," + ";".join(["0.1", "oops"] + ["0.1"] * 79))  # text in the list
    lines.append("25,1.0,1;2")  # a wrong length
    lines.append("26,1.0,0.1,0.2")  # a malformed line (an extra field): rejected, not lost
    (tmp_path / "survey.csv").write_text("\n".join(lines) + "\n")
    (tmp_path / "job.toml").write_text(
        '[input]\npaths = ["survey.csv"]\n[output]\ndir = "out"\n'
        '[columns]\nredshift = "z"\n'
        '[redshift_pdf]\nkind = "gridded"\ncolumn = "pz"\n'
        'grid = { start = 0.0, stop = 4.0, count = 81 }\n')
    assert main(["run", "--config", str(tmp_path / "job.toml"), "--quiet"]) == 0
    manifest = json.loads((tmp_path / "out" / "manifest.json").read_text())
    assert manifest["rows_read"] == 27
    assert manifest["rows_read"] == manifest["rows_written"] + manifest["rows_rejected"]
    assert manifest["rows_rejected"] == 1
    counts = manifest["flags"]["counts"]
    assert counts["redshift_pdf_missing"] == 1
    assert counts["redshift_pdf_nan"] == 1
    assert counts["redshift_pdf_wrong_length"] == 1
    frame = pd.concat(pd.read_parquet(p) for p in sorted((tmp_path / "out").glob("part-*")))
    expect = sorted(frame.loc[(frame.reachable_probability > 0.05)
                              & (frame.reachable_probability < 0.95), "id"])
    assert 3 <= len(expect) < 23  # some undecided, not all
    capsys.readouterr()
    assert main(["query", str(tmp_path / "out"), "SELECT id FROM selection ORDER BY id",
                 "--selection", "undecided", "--format", "csv"]) == 0
    got = list(pd.read_csv(io.StringIO(capsys.readouterr().out))["id"])
    assert got == expect
    assert main(["query", str(tmp_path / "out"), "SELECT id FROM selection", "--selection",
                 "undecided", "--param", "low=0.9", "--param", "high=0.5"]) == 2


def test_no_uncertainties_no_conflict_and_without_section_nothing(tmp_path):
    table = pa.table({"z": [1.0], "pz": list_column([GOOD])})
    out, _, plan = annotate(tmp_path, table, {"kind": "gridded", "column": "pz",
                                              "grid": GRID_CFG})
    assert "uncertainties" not in [s.name for s in plan.steps]
    assert out.column("reachable_probability")[0].as_py() == pytest.approx(
        norm.cdf(Z_EH, 1.0, 0.2), abs=2e-3)  # scipy.stats.norm


def test_reachability_only_output_equals_the_full_one(tmp_path):
    """outputs = "reachability" (float32 matrix-vector products) against the full double
    precision path (consistency check, float32 rounding of the sums)."""
    centres = np.linspace(0.5, 3.0, 40)
    dens = norm.pdf(GRID, centres[:, None], 0.2)
    dens[3, 10] = np.nan
    table = pa.table({"z": centres, "pz": list_column(dens)})
    full, f_full, _ = annotate(tmp_path, table, {"kind": "gridded", "column": "pz",
                                                 "grid": GRID_CFG})
    fast, f_fast, _ = annotate(tmp_path, table, {"kind": "gridded", "column": "pz",
                                                 "grid": GRID_CFG, "outputs": "reachability"})
    assert "redshift_p50" not in fast.column_names
    np.testing.assert_allclose(col(fast, "reachable_probability"),
                               col(full, "reachable_probability"), atol=2e-6)
    assert f_fast["redshift_pdf_nan"] == f_full["redshift_pdf_nan"] == 1


def test_two_annotators_replacing_the_same_column_are_refused(tmp_path):
    """Annotator.replaces: one replacer wins over a plain provider; two replacers clash."""
    from annotator import Annotator, ColumnSpec, hookimpl
    from annotator.config import job_from_mapping
    from annotator.errors import PlanError
    from annotator.plan import build_plan
    from annotator.registry import load_registry

    class Rival(Annotator):
        name = "rival_probability"
        replaces = ("reachable_probability",)
        provides = (ColumnSpec("reachable_probability", pa.float64(), None,
                               "stat.probability", "A rival."),)

        def annotate(self, batch):
            return {"reachable_probability": np.zeros(batch.num_rows)}

    class RivalPlugin:
        @staticmethod
        @hookimpl
        def register_annotators():
            return [Rival]

    pq.write_table(pa.table({"z": [1.0], "pz": list_column([GOOD])}), tmp_path / "c.parquet")
    job = job_from_mapping({"input": {"paths": ["c.parquet"]},
                            "redshift_pdf": {"kind": "gridded", "column": "pz",
                                             "grid": GRID_CFG}}, base_dir=tmp_path)
    with pytest.raises(PlanError, match="added by two annotators"):
        build_plan(job, load_registry(extra_plugins=[RivalPlugin]))
