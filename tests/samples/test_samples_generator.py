"""The Quillfield generator against outside references.

* Luminosity function: the form of Schechter (1976, ApJ 203, 297, eq. 1), integrated in closed
  form with the upper incomplete gamma function (the number density brighter than
  L = x L* is phi* Gamma(alpha + 1, x)), and the recurrence Gamma(a + 1, x) = a Gamma(a, x)
  + x^a e^-x (Abramowitz & Stegun 1964, 6.5.22, from memory) for alpha + 1 < 0.
* Evolution: M*(z) = M*(0) - Q z, phi*(z) = phi*(0) 10^(0.4 P z) (Lin et al. 1999, ApJ 518,
  533).
* Cosmology: astropy's Planck18 (Planck Collaboration 2020, A&A 641, A6, Table 2), a library
  independent of annotator.cosmology: dV_C/dz/dOmega and the distance modulus.
* K-corrections: Hogg et al. 2002 (astro-ph/0210394) eq. 13 (AB), integrated here directly on
  a 1 Angstrom grid, independently of the generator's helper.
"""

from __future__ import annotations

import gzip
import math

import numpy as np
import pyarrow.parquet as pq
import pytest
from scipy import special, stats

astropy_cosmology = pytest.importorskip("astropy.cosmology")
PLANCK18 = astropy_cosmology.Planck18
H = PLANCK18.H0.value / 100.0


def upper_gamma(a: float, x: np.ndarray) -> np.ndarray:
    """Gamma(a, x) for a > -1 (scipy's gammaincc needs a > 0)."""
    x = np.asarray(x, dtype=np.float64)
    if a > 0:
        return special.gamma(a) * special.gammaincc(a, x)
    if a == 0:
        return special.exp1(x)
    # Abramowitz & Stegun 1964, 6.5.22 (from memory): Gamma(a+1, x) = a Gamma(a, x) + x^a e^-x
    return (upper_gamma(a + 1.0, x) - x ** a * np.exp(-x)) / a


def _curve(path):
    data = np.loadtxt(path, delimiter=",", skiprows=1)
    return data[:, 0], data[:, 1]


def direct_kcorrection(sed, observed, rest, z: float) -> float:
    """K_QR(z), Hogg et al. 2002 eq. 13 with AB standards (g_lambda ~ lambda^-2), by the
    trapezoid rule on a 1 Angstrom grid spanning each filter."""
    swl, sf = sed

    def span(curve):
        wl, r = curve
        nz = np.flatnonzero(r > 0)
        grid = np.arange(wl[nz[0] - 1], wl[nz[-1] + 1] + 0.5, 1.0)
        return grid, np.interp(grid, wl, r)

    o_wl, o_r = span(observed)
    q_wl, q_r = span(rest)
    emitted = np.interp(o_wl / (1.0 + z), swl, sf)
    num = np.trapezoid(o_wl * emitted * o_r, o_wl) / (1.0 + z) * np.trapezoid(q_r / q_wl, q_wl)
    den = np.trapezoid(o_r / o_wl, o_wl) * np.trapezoid(q_wl * np.interp(q_wl, swl, sf) * q_r,
                                                         q_wl)
    return -2.5 * math.log10(num / den)


@pytest.fixture(scope="module")
def gen():
    from sample_catalogues import generate

    return generate


@pytest.fixture(scope="module")
def curves(gen):
    filters = {b: _curve(gen.HERE / "filters" / f"{b}.csv") for b in gen.BANDS}
    seds = {t.name: _curve(gen.HERE / "seds" / f"{t.name}.csv") for t in gen.GALAXY_TYPES}
    return filters, seds


@pytest.fixture(scope="module")
def expected_dndz(gen, curves):
    """Independent dN/dz per type on a redshift grid (see the module docstring)."""
    filters, seds = curves
    amber = filters[gen.SELECTION_BAND]
    z = np.linspace(gen.Z_MIN, gen.Z_MAX, 1500)
    kz = np.linspace(gen.Z_MIN, gen.Z_MAX, 300)
    mu = PLANCK18.distmod(z).value
    volume = PLANCK18.differential_comoving_volume(z).value * gen.FIELD_AREA_DEG2 \
        * (math.pi / 180.0) ** 2
    out = {}
    for t in gen.GALAXY_TYPES:
        k = np.interp(z, kz, [direct_kcorrection(seds[t.name], amber, amber, v) for v in kz])
        m_star = t.m_star_h + 5.0 * math.log10(H) - t.q_evolution * z
        phi_star = t.phi_star_h3 * H ** 3 * 10.0 ** (0.4 * t.p_evolution * z)
        m_lim = np.minimum(gen.SELECTION_LIMIT_MAG - mu - k, gen.ABSOLUTE_MAG_FAINT)
        x_lim = 10.0 ** (-0.4 * (m_lim - m_star))
        out[t.name] = volume * phi_star * upper_gamma(t.alpha + 1.0, x_lim)
    return z, out


def test_expected_counts_and_dndz_agree_with_closed_form(survey_model, expected_dndz, gen):
    z, expected = expected_dndz
    for t in gen.GALAXY_TYPES:
        model = np.interp(z, survey_model.z_grid, survey_model.dndz[t.name])
        want = expected[t.name]
        significant = want > 0.01 * want.max()
        rel = np.abs(model[significant] / want[significant] - 1.0)
        assert rel.max() < 2e-3, (t.name, rel.max())
        total = np.trapezoid(want, z)
        assert survey_model.expected_counts[t.name] == pytest.approx(total, rel=1e-3)


def test_redshifts_follow_expected_dndz(survey_model, expected_dndz, gen):
    """KS test of 40 000 drawn true redshifts against the independent dN/dz (all types)."""
    z_grid, expected = expected_dndz
    total = sum(expected.values())
    cdf = np.concatenate([[0.0], np.cumsum(0.5 * (total[1:] + total[:-1]) * np.diff(z_grid))])
    cdf /= cdf[-1]
    drawn = survey_model.draw_galaxies(np.random.default_rng(314159), 40_000)
    result = stats.kstest(drawn["z"], lambda v: np.interp(v, z_grid, cdf))
    assert result.pvalue > 1e-3, result
    # type fractions: binomial counts against the expected numbers (chi-square, 2 dof)
    counts = np.bincount(drawn["type_index"], minlength=len(gen.GALAXY_TYPES))
    want = np.array([np.trapezoid(expected[t.name], z_grid) for t in gen.GALAXY_TYPES])
    want = want / want.sum() * counts.sum()
    chi2 = float(((counts - want) ** 2 / want).sum())
    assert stats.chi2.sf(chi2, len(counts) - 1) > 1e-3, (counts, want)


def test_absolute_magnitudes_follow_truncated_schechter(survey_model, gen, curves):
    """Probability integral transform: for each galaxy, the fraction of the luminosity function
    at its z brighter than it, Gamma(a, x) / Gamma(a, x_lim), must be uniform on [0, 1]."""
    filters, seds = curves
    drawn = survey_model.draw_galaxies(np.random.default_rng(2718), 20_000)
    z, m_abs = drawn["z"], drawn["abs_mag"]
    mu = PLANCK18.distmod(z).value
    fractions = np.empty_like(z)
    kz = np.linspace(0.0, gen.Z_MAX, 200)
    amber = filters[gen.SELECTION_BAND]
    for k, t in enumerate(gen.GALAXY_TYPES):
        sel = drawn["type_index"] == k
        kcorr = np.interp(z[sel], kz, [direct_kcorrection(seds[t.name], amber, amber, v)
                                       for v in kz])
        m_star = t.m_star_h + 5.0 * math.log10(H) - t.q_evolution * z[sel]
        m_lim = np.minimum(gen.SELECTION_LIMIT_MAG - mu[sel] - kcorr, gen.ABSOLUTE_MAG_FAINT)
        x = 10.0 ** (-0.4 * (m_abs[sel] - m_star))
        x_lim = 10.0 ** (-0.4 * (m_lim - m_star))
        fractions[sel] = upper_gamma(t.alpha + 1, x) / upper_gamma(t.alpha + 1, x_lim)
    assert np.all(fractions <= 1.0 + 1e-3)
    assert stats.kstest(fractions, "uniform").pvalue > 1e-3


def test_apparent_magnitudes_are_absolute_plus_modulus_plus_k(survey_model, gen, curves):
    """m_band = M_amber + mu(z) + K_amber->band(z) for every band (Hogg et al. 2002 eq. 13)."""
    filters, seds = curves
    drawn = survey_model.draw_galaxies(np.random.default_rng(99), 60)
    mu = PLANCK18.distmod(drawn["z"]).value
    for i in range(60):
        t = gen.GALAXY_TYPES[drawn["type_index"][i]]
        for b, band in enumerate(gen.BANDS):
            k = direct_kcorrection(seds[t.name], filters[band], filters[gen.SELECTION_BAND],
                                   drawn["z"][i])
            assert drawn["mag"][i, b] == pytest.approx(drawn["abs_mag"][i] + mu[i] + k,
                                                       abs=3e-3), (t.name, band, drawn["z"][i])
    # the flux limit is on the true amber magnitude
    assert drawn["mag"][:, gen.BANDS.index("amber")].max() <= gen.SELECTION_LIMIT_MAG + 1e-6


def test_noise_model_matches_its_closed_form(gen):
    """S/N at the depth magnitude: 1 / sqrt(0.04 (1 + g) + floor^2) for the documented model
    sigma_f^2 = (f5/5)^2 (1 + g f/f5) + (floor f)^2 (common practice: sky + source + floor)."""
    rng = np.random.default_rng(5)
    depth = np.array([gen.DEPTH_5SIGMA_MAG[b] for b in gen.BANDS])
    true = np.tile(depth, (20_000, 1))
    mag, err = gen.observe_magnitudes(rng, true)
    floor = gen.CALIBRATION_FLOOR_MAG / (2.5 / math.log(10.0))
    snr = 1.0 / math.sqrt(0.04 * (1.0 + gen.SOURCE_NOISE_FRACTION) + floor ** 2)
    detected = np.isfinite(mag)
    # flux scatter around the truth equals sigma (in units of the true flux: 1/snr)
    flux = 10.0 ** (-0.4 * (mag[detected] - np.broadcast_to(depth, mag.shape)[detected]))
    assert np.std(flux) == pytest.approx(1.0 / snr, rel=0.05)
    # non-detections (below 2 sigma) are rare this bright and have a null error too
    assert np.all(np.isnan(err[~detected]))
    # errors grow towards the limit, in every band
    brighter = gen.observe_magnitudes(rng, np.tile(depth - 2.0, (2000, 1)))[1]
    assert np.all(np.nanmedian(brighter, axis=0) < np.nanmedian(err, axis=0))


def test_redshift_errors(gen):
    rng = np.random.default_rng(8)
    z_true = rng.uniform(0.1, 2.5, 50_000)
    bright = np.full(z_true.size, 19.0)  # all bright: 85 % spectroscopic
    z, z_err, spec = gen.observe_redshifts(rng, z_true, bright)
    assert spec.mean() == pytest.approx(0.85, abs=0.01)
    resid = (z - z_true) / (1.0 + z_true)
    assert np.std(resid[spec]) == pytest.approx(1e-4, rel=0.03)
    core = ~spec & (np.abs(resid) < 0.15)
    assert np.std(resid[core]) == pytest.approx(0.03, rel=0.05)
    np.testing.assert_allclose(z_err[spec], 1e-4 * (1 + z[spec]))
    np.testing.assert_allclose(z_err[~spec], 0.03 * (1 + z[~spec]))
    faint = np.full(z_true.size, 24.0)
    assert not gen.observe_redshifts(rng, z_true, faint)[2].any()


def test_generator_is_deterministic_for_a_seed(tmp_path, gen, survey_model):
    a = gen.generate(3000, tmp_path / "a.parquet", seed=11, model=survey_model)
    b = gen.generate(3000, tmp_path / "b.parquet", seed=11, model=survey_model)
    c = gen.generate(3000, tmp_path / "c.parquet", seed=12, model=survey_model)
    ta, tb, tc = (pq.read_table(tmp_path / f"{n}.parquet") for n in "abc")
    assert ta.equals(tb)
    assert not ta.equals(tc)
    assert a["malformed_lines"] == b["malformed_lines"] == []
    csv1 = gen.generate(3000, tmp_path / "a.csv.gz", seed=11, model=survey_model)
    csv2 = gen.generate(3000, tmp_path / "b.csv.gz", seed=11, model=survey_model)
    assert (tmp_path / "a.csv.gz").read_bytes() == (tmp_path / "b.csv.gz").read_bytes()
    assert csv1["malformed_lines"] == csv2["malformed_lines"]
    assert len(csv1["malformed_lines"]) == gen.DEFAULT_MALFORMED_LINES
    assert c["rows"] == 3000


def test_generated_rows_have_the_documented_content(tmp_path, gen, survey_model):
    summary = gen.generate(5000, tmp_path / "s.parquet", seed=3, model=survey_model)
    t = pq.read_table(tmp_path / "s.parquet")
    assert t.num_rows == 5000 and t.column_names == gen.COLUMN_ORDER
    df = t.to_pandas()
    assert df["object_id"].tolist() == list(range(1, 5001))
    half = gen.field_ra_width_deg() / 2
    assert df["ra"].between(gen.FIELD_RA_CENTRE_DEG - half, gen.FIELD_RA_CENTRE_DEG + half).all()
    assert df["dec"].between(gen.FIELD_DEC_MIN_DEG, gen.FIELD_DEC_MAX_DEG).all()
    # the RA x Dec box covers 40 deg^2 on the sphere (area = dRA (sin d2 - sin d1))
    area = math.radians(2 * half) * (math.sin(math.radians(gen.FIELD_DEC_MAX_DEG))
                                     - math.sin(math.radians(gen.FIELD_DEC_MIN_DEG)))
    assert area / (math.pi / 180) ** 2 == pytest.approx(40.0, rel=1e-12)
    # nulls and z_type agree; negative redshifts are the nearby spectroscopic ones
    assert (df["z"].isna() == (df["z_type"] == "none")).all()
    assert (df["z_err"].isna() == df["z"].isna()).all()
    negative = df[df["z"] < 0]
    assert len(negative) == summary["local_blueshifted_rows"] == summary["negative_z_rows"] >= 3
    assert (negative["z_type"] == "spec").all() and (negative["z"] > -0.0013).all()
    assert set(df["z_type"]) == {"spec", "phot", "none"}
    assert set(df["sed_type"]) == {t.name for t in gen.GALAXY_TYPES}
    for band in gen.BANDS:  # a magnitude and its error are null together
        assert (df[f"mag_{band}"].isna() == df[f"magerr_{band}"].isna()).all()


def test_csv_malformed_lines_are_where_the_summary_says(tmp_path, gen, survey_model):
    summary = gen.generate(2500, tmp_path / "m.csv.gz", seed=21, model=survey_model)
    lines = gzip.decompress((tmp_path / "m.csv.gz").read_bytes()).decode().splitlines()
    assert lines[0] == ",".join(gen.COLUMN_ORDER) and len(lines) == 2501
    n = len(gen.COLUMN_ORDER)
    for item in summary["malformed_lines"]:
        fields = lines[item["line"] - 1].split(",")
        if item["kind"] == "too_few_fields":
            assert len(fields) < n
        elif item["kind"] == "too_many_fields":
            assert len(fields) > n
        else:
            column = item["kind"].removeprefix("text_in_")
            value = fields[gen.COLUMN_ORDER.index(column)]
            with pytest.raises(ValueError):
                float(value)


def test_cli_errors_are_one_line(tmp_path, gen, capsys):
    assert gen.main(["--rows", "10", "--out", str(tmp_path / "x.txt")]) == 2
    assert "cannot tell the format" in capsys.readouterr().err
    assert gen.main(["--rows", "0", "--out", str(tmp_path / "x.csv")]) == 2
    assert "--rows" in capsys.readouterr().err
    assert gen.main(["--rows", "10", "--out", str(tmp_path / "x.csv"),
                     "--cosmology", "nonesuch"]) == 2
    assert "nonesuch" in capsys.readouterr().err
    assert not list(tmp_path.iterdir())


def test_photoz_pdfs_have_their_own_random_stream(tmp_path, gen, survey_model):
    """Every other column is identical with and without the PDFs (the posteriors draw from
    their own stream), and the PDFs are as documented: one per object with a redshift, on the
    grid of pdf_grid.csv, peak 1, and about PDF_BIMODAL_FRACTION (+ the outliers) with a
    second peak (counted by the redshift_pdf plugin's peak finder: a consistency check)."""
    from annotator_plugins.redshift_pdf.posterior import count_modes, trapezoid_weights

    gen.generate(3000, tmp_path / "with.parquet", seed=5, model=survey_model)
    gen.generate(3000, tmp_path / "without.parquet", seed=5, model=survey_model, pdfs=False)
    a = pq.read_table(tmp_path / "with.parquet")
    b = pq.read_table(tmp_path / "without.parquet")
    assert a.column_names == b.column_names + [gen.PDF_COLUMN]
    for name in b.column_names:
        assert a.column(name).equals(b.column(name)), name
    pdf = a.column(gen.PDF_COLUMN).combine_chunks()
    z = a.column("z").to_numpy(zero_copy_only=False)
    assert (pdf.is_null().to_numpy(zero_copy_only=False) == np.isnan(z)).all()
    dens = np.array([r for r in pdf.to_pylist() if r is not None])
    assert dens.shape[1] == gen.PDF_NODES and (dens >= 0).all()
    np.testing.assert_array_equal(dens.max(axis=1), 1.0)
    grid = gen.pdf_grid()
    write = tmp_path / "grid.csv"
    gen.write_pdf_grid(write)
    np.testing.assert_allclose(np.loadtxt(write, skiprows=1), grid, rtol=0, atol=1e-10)
    modes, _ = count_modes(dens, trapezoid_weights(grid), 0.05, 0.01)
    two = np.mean(modes >= 2)
    assert gen.PDF_BIMODAL_FRACTION - 0.03 < two < gen.PDF_BIMODAL_FRACTION + 0.05
    # the CSV holds the same PDFs as ';'-separated text
    gen.generate(200, tmp_path / "c.csv", seed=5, model=survey_model, malformed=0)
    gen.generate(200, tmp_path / "c.parquet", seed=5, model=survey_model)
    lines = (tmp_path / "c.csv").read_text().splitlines()
    assert lines[0].split(",")[-1] == gen.PDF_COLUMN
    ref = pq.read_table(tmp_path / "c.parquet").column(gen.PDF_COLUMN).to_pylist()
    for line, row in zip(lines[1:], ref):
        field = line.split(",")[-1]
        if row is None:
            assert field == ""
        else:
            np.testing.assert_allclose([float(v) for v in field.split(";")], row, atol=1e-6)
