"""Ready-made selections: each shown as its SQL, counts checked against pandas."""

from __future__ import annotations

import io

import numpy as np
import pandas as pd
import pytest
from _sql_helpers import read_output, run_cli

from annotator.errors import ConfigError
from annotator.sql.session import QuerySession


def _count(folder, *args, capsys) -> int:
    assert run_cli("query", folder, "SELECT count(*) AS n FROM selection", *args,
                   "--format", "csv") == 0
    return int(pd.read_csv(io.StringIO(capsys.readouterr().out))["n"].iloc[0])


def test_reachable_and_unreachable_partition_the_rows_with_a_redshift(outputs, capsys):
    frame = read_output(outputs.main).to_pandas()
    reachable = _count(outputs.main, "--selection", "reachable", capsys=capsys)
    unreachable = _count(outputs.main, "--selection", "unreachable", capsys=capsys)
    # Reference: the annotated column read by pyarrow/pandas (common practice).
    assert reachable == int((frame["reachable"] == True).sum())  # noqa: E712
    assert unreachable == int((frame["reachable"] == False).sum())  # noqa: E712
    assert reachable + unreachable + int(frame["reachable"].isna().sum()) == len(frame)
    # Planck 2018: the event horizon today lies at z ~ 1.85 (Margalef-Bentabol et al. 2013,
    # JCAP 02, 015, for a flat Lambda-CDM with Omega_m ~ 0.31; from memory): no reachable
    # object beyond, none unreachable below.
    with QuerySession(outputs.main) as s:
        s.use_selection("reachable")
        (zmax,), = s.relation("SELECT max(z) FROM selection").fetchall()
        s.use_selection("unreachable")
        (zmin,), = s.relation("SELECT min(z) FROM selection").fetchall()
    assert 1.80 < zmax < zmin < 1.90


def test_clean_and_flagged_partition_every_row(outputs, capsys):
    clean = _count(outputs.main, "--selection", "clean", capsys=capsys)
    flagged = _count(outputs.main, "--selection", "flagged", capsys=capsys)
    assert (clean, flagged) == (4995, 5)  # 3 missing and 2 negative redshifts (conftest)


def test_redshift_slice_counts_and_sql(outputs, capsys):
    frame = read_output(outputs.main).to_pandas()
    n = _count(outputs.main, "--selection", "redshift_slice", "--param", "zmin=0.5",
               "--param", "zmax=1", capsys=capsys)
    assert n == int(((frame["z"] >= 0.5) & (frame["z"] < 1.0)).sum()) > 0
    assert run_cli("query", outputs.main, "--selection", "redshift_slice", "--param",
                   "zmin=0.5", "--param", "zmax=1", "--show-sql") == 0
    shown = capsys.readouterr().out
    assert 'WHERE "z" >= 0.5 AND "z" < 1.0' in shown and "SELECT * FROM selection" in shown
    assert run_cli("query", outputs.main, "--list-selections") == 0
    listing = capsys.readouterr().out
    for name in ("reachable", "unreachable", "redshift_slice", "clean", "flagged"):
        assert f"\n{name}  [sql_functions]" in "\n" + listing
    assert "${zmin}" in listing


@pytest.mark.parametrize("params, message", [
    (["--param", "zmin=0.5"], "needs --param zmax"),
    (["--param", "zmin=0.5", "--param", "zmax=abc"], "'abc' is not a number"),
    (["--param", "zmin=1", "--param", "zmax=0.5"], "must be above zmin"),
    (["--param", "zmin=0", "--param", "zmax=1", "--param", "dz=1"], "no such parameter"),
    (["--param", "zmin=nan", "--param", "zmax=1"], "not a finite number"),
])
def test_selection_parameters_are_checked(outputs, capsys, params, message):
    assert run_cli("query", outputs.main, "--selection", "redshift_slice", *params) == 2
    err = capsys.readouterr().err
    assert message in err and err.count("\n") == 1


def test_unknown_selection_lists_the_available_ones(outputs):
    with QuerySession(outputs.main) as s:
        with pytest.raises(ConfigError, match="available: .*reachable"):
            s.use_selection("brightest")
        # no absolute magnitudes in this output: no volume-limited sample offered
        assert "volume_limited" not in s.selections


def test_volume_limited_sample(output_with_magnitudes, capsys):
    # Definition (common practice, e.g. Peebles 1993 sect. 5 on volume-limited samples): keep
    # 0 < z <= z_max and M <= m_lim - mu(z_max) - K(z_max); mu from astropy Planck18 here.
    astropy_cosmology = pytest.importorskip("astropy.cosmology")
    mu = float(astropy_cosmology.Planck18.distmod(1.0).value)
    frame = read_output(output_with_magnitudes).to_pandas()
    z, absolute = frame["z"], frame["absolute_magnitude_r_mag"]
    mlim, zmax, kmax = 23.0, 1.0, -0.75
    n = _count(output_with_magnitudes, "--selection", "volume_limited", "--param",
               f"mlim={mlim}", "--param", f"zmax={zmax}", "--param", f"kmax={kmax}",
               capsys=capsys)
    expected = (z > 0) & (z <= zmax) & (absolute <= mlim - mu - kmax)
    assert n == int(expected.sum()) > 100
    # default K(zmax): the median K of the 101 objects nearest zmax (either side)
    near = frame[z > 0].assign(dz=(z - zmax).abs()).sort_values("dz").head(101)
    k_est = float(np.median(near["kcorrection_r_mag"]))
    # the test spectrum has K = -2.5 log10(1 + z) (Hogg et al. 2002, eq. 13, f_nu flat)
    assert k_est == pytest.approx(-2.5 * np.log10(1 + zmax), abs=0.005)
    n_default = _count(output_with_magnitudes, "--selection", "volume_limited", "--param",
                       f"mlim={mlim}", "--param", f"zmax={zmax}", capsys=capsys)
    assert n_default == int(((z > 0) & (z <= zmax) & (absolute <= mlim - mu - k_est)).sum())
    # every kept object would still be brighter than the limit if moved to zmax
    with QuerySession(output_with_magnitudes) as s:
        s.use_selection("volume_limited", {"mlim": mlim, "zmax": zmax, "kmax": kmax})
        (faintest,), = s.relation("SELECT max(absolute_magnitude_r_mag) FROM selection") \
            .fetchall()
    assert faintest + mu + kmax <= mlim
    assert run_cli("query", output_with_magnitudes, "--selection", "volume_limited",
                   "--param", "mlim=23", "--param", "zmax=1", "--param", "band=g") == 2
    assert "not one of r" in capsys.readouterr().err
