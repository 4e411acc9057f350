"""Every built-in cosmological column of a run, against closed forms.

Einstein-de Sitter (Omega_m = 1, flat, no radiation), with s = sqrt(1 + z),
D_H = c / H0 and t_H = 1 / H0 (constants from tests/cosmology/_reference_constants.py):

* D_C = D_M = 2 D_H (1 - 1/s); D_A = D_M / (1+z); D_L = (1+z) D_M (Hogg 1999,
  arXiv:astro-ph/9905116, eqs. 16, 18, 21 and sec. 5; Weinberg 1972, ch. 15);
* lookback = (2/3) t_H (1 - s^-3), age at emission = (2/3) t_H s^-3 (a ~ t^(2/3));
* recession velocity now D_C H0 / c = 2 (1 - 1/s), at emission
  H(z) D_C / ((1+z) c) = 2 (s - 1) (Davis & Lineweaver 2004, PASA 21, 97, eq. 1 and
  fig. 1's EdS curves);
* no event horizon: every object reachable, no crossing age, and a signal sent now
  reaches chi (units D_H) at t = (2/3) t_H ((2 + chi)/2)^3 (eta0 = 2 D_H, a = (eta/2)^2).
"""

from __future__ import annotations

import math
import os
import sys

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from annotator.cli import main

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "cosmology"))
import _reference_constants as RC  # noqa: E402

Z = np.array([1e-4, 0.01, 0.3, 1.0, 2.5, 10.0, 1100.0, 1e5, 1e9])


def _run(tmp_path, cosmology_toml, z):
    pq.write_table(pa.table({"objid": np.arange(z.size), "z": z}), tmp_path / "c.parquet")
    job = tmp_path / "job.toml"
    job.write_text(f'[input]\npaths = ["{tmp_path / "c.parquet"}"]\n'
                   f'[output]\ndir = "{tmp_path / "out"}"\n{cosmology_toml}')
    assert main(["run", "--config", str(job), "--quiet"]) == 0
    t = pa.concat_tables(pq.read_table(p) for p in sorted((tmp_path / "out").glob("part-*")))
    return {n: t.column(n).to_numpy(zero_copy_only=False) for n in t.column_names
            if n != "annotation_flags"}, t.column("annotation_flags").to_pylist()


def test_einstein_de_sitter_columns(tmp_path):
    cols, flags = _run(tmp_path, "[cosmology]\nh0 = 70\nomega_m = 1.0\n", Z)
    dh = RC.SPEED_OF_LIGHT_KM_S / 70.0
    th = RC.MEGAPARSEC_KM / 70.0 / RC.GIGAYEAR_S
    s = np.sqrt(1 + Z)
    chi = 2 * (1 - 1 / s)
    expected = {
        "comoving_distance_mpc": chi * dh,
        "transverse_comoving_distance_mpc": chi * dh,
        "angular_diameter_distance_mpc": chi * dh / (1 + Z),
        "luminosity_distance_mpc": chi * dh * (1 + Z),
        "lookback_time_gyr": 2 / 3 * th * (1 - s**-3),
        "age_at_emission_gyr": 2 / 3 * th * s**-3,
        "recession_velocity_now_c": chi,
        "recession_velocity_at_emission_c": 2 * (s - 1),
        "signal_arrival_age_gyr": 2 / 3 * th * ((2 + chi) / 2) ** 3,
    }
    for name, ref in expected.items():
        np.testing.assert_allclose(cols[name], ref, rtol=1e-9, atol=0, err_msg=name)
    np.testing.assert_allclose(cols["distance_modulus_mag"],
                               5 * np.log10(chi * dh * (1 + Z) / RC.TEN_PARSEC_MPC),
                               rtol=0, atol=1e-9)
    assert cols["reachable"].astype(bool).all()
    assert np.isnan(cols["horizon_crossing_age_gyr"]).all()
    assert flags == [""] * Z.size


def test_de_sitter_limit_horizon_columns(tmp_path):
    # Omega_m -> 0 (1e-12): de Sitter, E = 1.  D_C = D_H z, event horizon D_H at z_EH = 1;
    # a = e^(H0 t) so the crossing (remaining conformal time e^(-H0 t) D_H equal to D_C)
    # happens at t = t_H (ln(1/z) + const): crossing age difference between two objects is
    # t_H ln(z2 / z1) (Rindler 1956, MNRAS 116, 662, for the de Sitter horizon).
    z = np.array([0.1, 0.5, 0.9999, 1.0001, 1.001, 3.0])
    cols, flags = _run(tmp_path, "[cosmology]\nh0 = 70\nomega_m = 1e-12\n", z)
    th = RC.MEGAPARSEC_KM / 70.0 / RC.GIGAYEAR_S
    assert cols["reachable"].astype(bool).tolist() == [True, True, True, False, False, False]
    cross = cols["horizon_crossing_age_gyr"]
    np.testing.assert_allclose(cross[1:] - cross[0], th * np.log(z[0] / z[1:]), rtol=0,
                               atol=1e-6 * th)
    arrive = cols["signal_arrival_age_gyr"]
    assert np.isfinite(arrive[:3]).all() and np.isnan(arrive[3:]).all()
    assert flags == [""] * z.size
