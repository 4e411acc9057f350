"""``annotator report``: one self-contained HTML file whose numbers are the manifest's.

Outputs are made with ``annotator.cli.main(["run", ...])`` on the invented catalogues of
tests/conftest.py. References outside the report code: the manifest itself and pyarrow / numpy
computations over every written row (counts, histogram), the PNG specification (signature and
IHDR layout, RFC 2083 / ISO/IEC 15948), Pillow as an independent PNG decoder, the IAU
definitions of the parsec and the light-year (Gly conversions), and scipy's two-sample
Kolmogorov-Smirnov test for the sample's uniformity.
"""

from __future__ import annotations

import base64
import importlib.util
import io
import json
import math
import shutil
import subprocess
import sys
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
import pytest

from annotator import Annotator, ColumnSpec, hookimpl
from annotator.cli import main
from annotator.config import load_job
from annotator.registry import load_registry
from annotator.report import build_report
from annotator.report.data import draw_sample, open_output
from annotator.report.figures import _ra_span, faint_edge
from annotator.runner import run_job

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (RFC 2083, section 3.1)
# the catalogues carry a redshift error, so the uncertainties annotator writes
# reachable_probability and the report shows its distribution (no posteriors to draw)
ALL_FIGURES = {"distance-redshift", "redshift-distribution", "hubble-diagram", "sky-map",
               "reachability-probability"}
SAMPLE = 1500


def _root_conftest():
    """tests/conftest.py loaded under its own name (other folders have a conftest too)."""
    path = Path(__file__).resolve().parents[1] / "conftest.py"
    spec = importlib.util.spec_from_file_location("_annotator_root_conftest", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


make_catalogue = _root_conftest().make_catalogue


# ---------------------------------------------------------------------------- parsing
class _Page(HTMLParser):
    """Every tag with its attributes, and the text inside each data-key element."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict]] = []
        self.keyed: list[dict] = []
        self._open: list[dict | None] = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append((tag, a))
        if tag in ("img", "meta", "br", "link", "input"):
            return
        rec = None
        if "data-key" in a:
            rec = {"tag": tag, "attrs": a, "text": ""}
            self.keyed.append(rec)
        self._open.append(rec)

    def handle_endtag(self, tag):
        if self._open:
            self._open.pop()

    def handle_data(self, data):
        for rec in self._open:
            if rec is not None:
                rec["text"] += data


def parse(path: Path) -> _Page:
    p = _Page()
    p.feed(path.read_text(encoding="utf-8"))
    return p


def manifest_value(manifest: dict, key: str):
    """Follow a data-key path: '/' between keys; in a list, an item by 'name' or index."""
    node = manifest
    for part in key.split("/"):
        if isinstance(node, list):
            named = [x for x in node if isinstance(x, dict) and x.get("name") == part]
            node = named[0] if named else node[int(part)]
        else:
            node = node[part]
    return node


def figures_of(page: _Page) -> dict[str, bytes]:
    out = {}
    for tag, a in page.tags:
        if tag == "img":
            src = a["src"]
            assert src.startswith("data:image/png;base64,"), src[:40]
            out[a["data-figure"]] = base64.b64decode(src.split(",", 1)[1], validate=True)
    return out


def full_column(out: Path, name: str) -> pa.ChunkedArray:
    return pq.read_table(sorted(out.glob("part-*.parquet")), columns=[name]).column(name)


# --------------------------------------------------------------------------- outputs
def _run(*args) -> int:
    return main(["run", *map(str, args), "--quiet"])


@pytest.fixture(scope="module")
def full(tmp_path_factory):
    """A planck2018 run over 4 parts with ra/dec, flags, and its report."""
    base = tmp_path_factory.mktemp("full")
    cat = base / "cat.parquet"
    pq.write_table(make_catalogue(4000), cat)
    out = base / "out"
    assert _run(cat, "--out", out, "--chunk-rows", 1000) == 0
    report = base / "report.html"
    assert main(["report", str(out), "--to", str(report), "--sample-rows", str(SAMPLE),
                 "--seed", "3"]) == 0
    return out, report, parse(report), json.loads((out / "manifest.json").read_text())


@pytest.fixture(scope="module")
def bare(tmp_path_factory):
    """No ra/dec, no rejected rows, no bands, and a model without an event horizon."""
    base = tmp_path_factory.mktemp("bare")
    table = make_catalogue(1500).drop(["ra", "dec"])
    cat = base / "cat.parquet"
    pq.write_table(table, cat)
    job = base / "job.toml"
    # Einstein-de Sitter (Omega_m = 1, no dark energy): no event horizon, every object
    # reachable; Hubble sphere at z = 3 (v = 2c(1 - 1/sqrt(1+z)), e.g. Davis & Lineweaver
    # 2004, PASA 21, 97, section 3).
    # The horizons annotator is off: reachability then comes from the redshift and the model.
    job.write_text('[cosmology]\nname = "einstein-de-sitter"\nh0 = 70.0\nomega_m = 1.0\n'
                   'omega_de = 0.0\n\n[annotators]\nhorizons = false\n', encoding="utf-8")
    out = base / "out"
    assert _run(cat, "--out", out, "--config", job) == 0
    report = base / "report.html"
    assert main(["report", str(out), "--to", str(report), "--sample-rows", "800"]) == 0
    return out, report, parse(report), json.loads((out / "manifest.json").read_text())


# ------------------------------------------------------------------------ the file
@pytest.mark.parametrize("which", ["full", "bare"])
def test_file_is_self_contained(which, request):
    out, report, page, _ = request.getfixturevalue(which)
    text = report.read_text(encoding="utf-8")
    assert text.startswith("<!DOCTYPE html>")
    for tag, attrs in page.tags:
        assert tag not in ("script", "link", "iframe", "object", "embed"), tag
        for name, value in attrs.items():
            if name == "src":
                assert value.startswith("data:"), (tag, value[:60])
            if name == "href":
                assert value.startswith("#"), (tag, value)  # only links inside the page
            assert "http://" not in (value or "") and "https://" not in (value or "")
    css = text[text.index("<style>"):text.index("</style>")]
    assert "url(" not in css and "@import" not in css
    # every in-page link has its target
    ids = {a.get("id") for _, a in page.tags}
    for _, a in page.tags:
        if a.get("href", "").startswith("#"):
            assert a["href"][1:] in ids, a["href"]


def test_every_figure_decodes(full):
    from PIL import Image

    _, _, page, _ = full
    figs = figures_of(page)
    assert set(figs) == ALL_FIGURES
    sizes = {a["data-figure"]: (int(a["width"]), int(a["height"]))
             for t, a in page.tags if t == "img"}
    for name, png in figs.items():
        assert png[:8] == PNG_SIGNATURE, name
        with Image.open(io.BytesIO(png)) as im:
            im.load()  # decodes every pixel: a truncated or corrupt stream raises
            assert im.size == sizes[name]
            assert im.size[0] > 600 and im.size[1] > 300
            grey = np.asarray(im.convert("L"), dtype=float)
        # not blank: ink on a white page
        assert grey.min() < 60 and grey.max() > 250 and grey.std() > 10, name


def test_bare_output_skips_figures_with_a_note(bare):
    out, report, page, manifest = bare
    figs = figures_of(page)
    assert set(figs) == {"distance-redshift", "redshift-distribution", "hubble-diagram",
                         "reachability-probability"}
    skipped = {a["data-skipped"] for _, a in page.tags if "data-skipped" in a}
    assert skipped == {"sky-map", "absolute-magnitudes", "example-posteriors"}
    text = report.read_text(encoding="utf-8")
    assert "No row was set aside" in text
    assert manifest["rows_rejected"] == 0
    assert manifest["cosmology"]["derived"]["event_horizon_mpc"] is None
    assert "reachable" not in pq.read_schema(next(out.glob("part-*.parquet"))).names
    values = {r["attrs"]["data-key"]: json.loads(r["attrs"]["data-value"]) for r in page.keyed}
    # no event horizon: every object with a usable redshift stays reachable
    assert values["aggregate/reachable"] == values["aggregate/usable_redshift"] == 1495
    assert values["aggregate/unreachable"] == 0


# ----------------------------------------------------------------- numbers vs manifest
REQUIRED_KEYS = ("rows_read", "rows_written", "rows_rejected", "rows_flagged", "elapsed_s",
                 "rows_per_second", "started_at", "finished_at", "engine", "tool/annotator",
                 "cosmology/derived/age_today_gyr", "cosmology/derived/hubble_distance_mpc",
                 "cosmology/derived/event_horizon_mpc", "cosmology/derived/particle_horizon_mpc",
                 "cosmology/derived/hubble_sphere_redshift",
                 "cosmology/derived/event_horizon_redshift", "cosmology/parameters/h0")


def _shown_number(text: str) -> float | None:
    t = text.strip().replace(",", "").replace(" rows/s", "").replace(" s", "")
    try:
        return float(t)
    except ValueError:
        return None


@pytest.mark.parametrize("which", ["full", "bare"])
def test_summary_numbers_are_the_manifests(which, request):
    _, _, page, manifest = request.getfixturevalue(which)
    seen = set()
    for rec in page.keyed:
        key = rec["attrs"]["data-key"]
        if key.startswith("aggregate/"):
            continue
        exact = json.loads(rec["attrs"]["data-value"])
        assert exact == manifest_value(manifest, key), key
        seen.add(key)
        shown = _shown_number(rec["text"])
        if isinstance(exact, (int, float)) and not isinstance(exact, bool) and shown is not None:
            # the readable form rounds, never misstates
            assert shown == pytest.approx(exact, rel=1e-3, abs=0.051), (key, rec["text"])
    missing = [k for k in REQUIRED_KEYS if k not in seen]
    assert not missing
    for reason in manifest["flags"]["counts"]:
        assert f"flags/counts/{reason}" in seen
    for ann in manifest["annotators"]:
        assert f"annotators/{ann['name']}/version" in seen
    for k in manifest["cosmology"]["parameters"]:
        assert f"cosmology/parameters/{k}" in seen


def test_flagged_rows_show_up(full):
    _, _, page, manifest = full
    # make_catalogue: rows 0-2 have no redshift, rows 3-4 a negative one (tests/conftest.py)
    assert manifest["flags"]["counts"]["redshift_missing"] == 3
    assert manifest["flags"]["counts"]["redshift_negative"] == 2
    keyed = {r["attrs"]["data-key"]: r for r in page.keyed}
    assert keyed["flags/counts/redshift_missing"]["text"] == "3"


def test_aggregates_count_every_row(full):
    out, _, page, manifest = full
    z = full_column(out, "z").to_numpy(zero_copy_only=False).astype(float)
    reach = full_column(out, "reachable")
    usable = np.isfinite(z) & (z >= 0)
    values = {r["attrs"]["data-key"]: json.loads(r["attrs"]["data-value"]) for r in page.keyed}
    assert values["aggregate/usable_redshift"] == int(usable.sum()) == 3995
    assert values["aggregate/reachable"] == pc.sum(pc.equal(reach, True)).as_py()
    assert values["aggregate/unreachable"] == pc.sum(pc.equal(reach, False)).as_py()
    assert values["aggregate/parts"] == len(manifest["parts"]) == 4
    # reachable means below the event-horizon redshift (the horizons annotator's meaning)
    z_eh = manifest["cosmology"]["derived"]["event_horizon_redshift"]
    assert values["aggregate/reachable"] == int((z[usable] < z_eh).sum())


def test_histogram_counts_every_row(full):
    """The histogram's data against numpy.histogram over the full column."""
    from annotator.report.data import redshift_aggregate

    out, _, _, manifest = full
    derived = manifest["cosmology"]["derived"]
    agg = redshift_aggregate(open_output(out), derived["event_horizon_redshift"], True)
    z = full_column(out, "z").to_numpy(zero_copy_only=False).astype(float)
    z = z[np.isfinite(z) & (z >= 0)]
    total = agg.counts_reachable + agg.counts_unreachable + agg.counts_unknown
    expected, _ = np.histogram(z, bins=agg.edges)
    # numpy's last bin is closed, floor() puts the maximum in the last bin too: same rule
    assert np.array_equal(total, expected)
    assert total.sum() + agg.above_range == len(z)
    assert agg.counts_unknown.sum() == 0
    # the range reaches past the event horizon so the marker is inside the plot
    assert agg.edges[-1] >= derived["event_horizon_redshift"]


def test_a_few_wild_redshifts_do_not_squash_the_histogram(tmp_path):
    from annotator.report.data import redshift_aggregate

    table = make_catalogue(1200)
    z = table.column("z").to_numpy(zero_copy_only=False).copy()
    z[100], z[200] = 4.0e4, 7.5e5  # two wild values among z < 3
    table = table.set_column(table.schema.get_field_index("z"), "z", pa.array(z))
    cat = tmp_path / "cat.parquet"
    pq.write_table(table, cat)
    out = tmp_path / "out"
    assert _run(cat, "--out", out) == 0
    derived = json.loads((out / "manifest.json").read_text())["cosmology"]["derived"]
    agg = redshift_aggregate(open_output(out), derived["event_horizon_redshift"], True)
    assert agg.edges[-1] < 4.0 and agg.above_range == 2 and agg.z_max == 7.5e5
    usable = z[np.isfinite(z) & (z >= 0)]
    expected, _ = np.histogram(usable, bins=agg.edges)  # numpy as the reference
    total = agg.counts_reachable + agg.counts_unreachable + agg.counts_unknown
    assert np.array_equal(total, expected) and total.sum() + 2 == len(usable)
    # the event-horizon redshift is a bin edge (no bin mixes the two classes)
    k = int(np.argmin(np.abs(agg.edges - derived["event_horizon_redshift"])))
    assert agg.edges[k] == pytest.approx(derived["event_horizon_redshift"], rel=1e-12)
    assert agg.counts_unreachable[:k].sum() == 0 and agg.counts_reachable[k:].sum() == 0


def test_gly_conversions_follow_the_iau_definitions(full):
    """Distances shown in Gly: 1 pc = 648000/pi au, au = 149 597 870 700 m (IAU 2012 B2,
    2015 B2); light-year = c * Julian year (365.25 d); c = 299 792 458 m/s (SI)."""
    _, report, _, manifest = full
    mpc_m = 1e6 * 149_597_870_700.0 * 648_000.0 / math.pi
    gly_m = 1e9 * 299_792_458.0 * 365.25 * 86_400.0
    text = report.read_text(encoding="utf-8")
    d = manifest["cosmology"]["derived"]["particle_horizon_mpc"]
    assert f"{d * mpc_m / gly_m:,.4g} Gly" in text


def test_stored_values_agree_with_the_recorded_cosmology(full):
    _, report, _, _ = full
    text = report.read_text(encoding="utf-8")
    table = text[text.index('<table id="consistency">'):]
    table = table[:table.index("</table>")]
    assert "comoving_distance_mpc" in table and "reachable" in table
    assert "DISAGREE" not in table and table.count(">agree<") >= 5


def test_a_tampered_output_is_caught(tmp_path):
    """Stored distances that do not follow the recorded cosmology are called out."""
    cat = tmp_path / "cat.parquet"
    pq.write_table(make_catalogue(600), cat)
    out = tmp_path / "out"
    assert _run(cat, "--out", out) == 0
    part = next(out.glob("part-*.parquet"))
    t = pq.read_table(part)
    meta = t.schema.metadata
    i = t.schema.get_field_index("comoving_distance_mpc")
    t = t.set_column(i, "comoving_distance_mpc", pc.multiply(t.column(i), 1.01))
    pq.write_table(t.replace_schema_metadata(meta), part)
    result = build_report(out, tmp_path / "r.html", sample_rows=200)
    text = result.path.read_text(encoding="utf-8")
    assert "DISAGREE" in text and "do not match the cosmology" in text


# ------------------------------------------------------- rejected rows, bands
class _AbsoluteMagnitudeR(Annotator):
    """Test-only annotator: M_r = m_r - mu (no K-correction), named like the K-correction
    plugin's columns, plus an error column the report must not take for a band."""

    name = "test_absolute_r"
    version = "0.1"
    summary = "test"
    input_hints = {"magnitude_r": ("mag_r",)}
    requires = ("magnitude_r", "distance_modulus_mag")
    provides = (
        ColumnSpec("absolute_magnitude_r_mag", pa.float64(), "mag", "phys.magAbs", "M_r"),
        ColumnSpec("absolute_magnitude_r_err_mag", pa.float64(), "mag", "stat.error", "err"),
    )

    def annotate(self, batch):
        m = batch.values("magnitude_r") - batch.values("distance_modulus_mag")
        return {"absolute_magnitude_r_mag": m,
                "absolute_magnitude_r_err_mag": np.full(len(m), 0.05)}


class _Plugin:
    @hookimpl
    def register_annotators(self):
        return [_AbsoluteMagnitudeR]


def test_rejected_rows_and_bands(tmp_path):
    """A CSV with bad lines (set aside by reason, examples escaped) and an annotator adding
    absolute magnitudes (one figure per band; the error column is no band)."""
    table = make_catalogue(2400).to_pandas()
    cat = tmp_path / "cat.csv"
    table.to_csv(cat, index=False)
    lines = cat.read_text().splitlines()
    fields = lines[20].split(",")
    fields[3] = "<b>far</b>"  # not a number, and markup that must not reach the page
    lines[20] = ",".join(fields)
    lines.insert(40, "1,2,3")
    lines.insert(41, "4,5,6")
    cat.write_text("\n".join(lines) + "\n")
    out = tmp_path / "out"
    job = load_job(None, inputs=[str(cat)], output_dir=str(out), chunk_rows=1000)
    manifest = run_job(job, pm=load_registry(extra_plugins=[_Plugin()]))
    assert manifest["rows_rejected"] == 3
    assert open_output(out).bands == {"r": "absolute_magnitude_r_mag"}
    report = tmp_path / "r.html"
    assert main(["report", str(out), "--to", str(report), "--sample-rows", "1000"]) == 0
    page = parse(report)
    rejected = pq.read_table(sorted((out / "rejected").glob("*.parquet"))).to_pandas()
    by_reason = rejected.groupby("reason").size().to_dict()
    shown = {r["attrs"]["data-reason"]: json.loads(r["attrs"]["data-value"])
             for r in page.keyed if r["attrs"]["data-key"] == "aggregate/rejected_by_reason"}
    assert shown == by_reason and len(shown) == 2
    assert sum(shown.values()) == manifest["rows_rejected"]
    text = report.read_text(encoding="utf-8")
    assert "<b>far</b>" not in text and "&lt;b&gt;far&lt;/b&gt;" in text
    assert "row 41" in text or "row 42" in text  # examples name the line
    figs = figures_of(page)
    assert set(figs) == ALL_FIGURES | {"absolute-magnitudes"}
    from PIL import Image

    with Image.open(io.BytesIO(figs["absolute-magnitudes"])) as im:
        im.load()


# --------------------------------------------------------------------------- the sample
def test_sample_is_seeded_uniform_and_capped(full):
    from scipy.stats import ks_2samp

    out_dir, _, _, _ = full
    out = open_output(out_dir)
    a = draw_sample(out, ["objid", "z"], 1000, seed=5)
    b = draw_sample(out, ["objid", "z"], 1000, seed=5)
    c = draw_sample(out, ["objid", "z"], 1000, seed=6)
    assert np.array_equal(a.values["objid"], b.values["objid"])
    assert not np.array_equal(a.values["objid"], c.values["objid"])
    assert len(np.unique(a.values["objid"])) == 1000  # without replacement
    # uniform over rows: its object ids against all ids, two-sample Kolmogorov-Smirnov
    ids = full_column(out_dir, "objid").to_numpy()
    assert ks_2samp(a.values["objid"], ids).pvalue > 0.01
    everything = draw_sample(out, ["objid"], 10**9, seed=0)
    assert everything.size == 4000
    assert np.array_equal(np.sort(everything.values["objid"]), np.sort(ids))


def test_sampling_is_stated(full):
    _, _, page, _ = full
    li = next(a for t, a in page.tags if a.get("id") == "sampling")
    assert li["data-sample-rows"] == str(SAMPLE) and li["data-seed"] == "3"
    assert li["data-population"] == "4000"


def test_faint_edge_follows_the_flux_limit():
    """m ~ N(21, 1) at every z, M = m - mu(z): the 98th percentile of M in a thin z bin is
    m_98 - mu(z) with m_98 = 21 + Phi^-1(0.98) (normal quantile, scipy.stats.norm)."""
    from scipy.stats import norm

    from annotator.cosmology import preset

    cosmo = preset("planck2018")
    rng = np.random.default_rng(11)
    z = rng.uniform(0.5, 3.0, 200_000)
    m = rng.normal(21.0, 1.0, len(z))
    ze, me = faint_edge(z, m - cosmo.distance_modulus_mag(z), bins=24)
    expected = 21.0 + norm.ppf(0.98) - cosmo.distance_modulus_mag(ze)
    # mu changes across a bin (~0.1 in z): a few tenths of a magnitude at most
    assert np.max(np.abs(me - expected)) < 0.15
    assert np.all(np.diff(me) < 0)  # brighter limit at higher redshift


def test_empty_universe_reference_of_the_hubble_diagram():
    """The residual panel's reference against astropy's LambdaCDM(Om0=0, Ode0=0), the empty
    open universe (outside reference; closed form D_L = c z (1 + z/2) / H0)."""
    from astropy.cosmology import LambdaCDM

    from annotator.report.figures import empty_universe_distance_modulus_mag

    z = np.array([0.001, 0.1, 0.5, 1.0, 3.0, 10.0, 1000.0])
    reference = LambdaCDM(H0=67.66, Om0=0.0, Ode0=0.0, Tcmb0=0.0).distmod(z).value
    assert np.allclose(empty_universe_distance_modulus_mag(z, 67.66), reference, atol=1e-9)


def test_ra_span_across_zero():
    # closed forms: points at 350..10 degrees span 20 degrees starting at 350
    start, width = _ra_span(np.array([350.0, 355.0, 0.0, 5.0, 10.0]))
    assert (start, width) == (350.0, 20.0)
    start, width = _ra_span(np.array([150.0, 160.0]))
    assert (start, width) == (150.0, 10.0)


# ---------------------------------------------------------------------- empty / errors
def test_report_of_an_empty_output(tmp_path):
    cat = tmp_path / "cat.parquet"
    pq.write_table(make_catalogue(10).slice(0, 0), cat)
    out = tmp_path / "out"
    assert _run(cat, "--out", out) == 0
    result = build_report(out, tmp_path / "r.html", sample_rows=100)
    assert result.rows == 0 and result.sampled == 0
    text = result.path.read_text(encoding="utf-8")
    assert "No row of this output has a usable redshift" in text
    assert set(figures_of(parse(result.path))) == ALL_FIGURES  # curves, no points


def test_user_errors_are_one_line(tmp_path, capsys):
    assert main(["report", str(tmp_path / "nowhere"), "--to", str(tmp_path / "r.html")]) == 2
    err = capsys.readouterr().err
    assert err.startswith("annotator: error:") and "nowhere" in err and err.count("\n") == 1
    empty = tmp_path / "empty"
    empty.mkdir()
    assert main(["report", str(empty), "--to", str(tmp_path / "r.html")]) == 2
    assert "manifest.json" in capsys.readouterr().err


def test_missing_part_and_bad_options_are_named(full, tmp_path, capsys):
    out, _, _, manifest = full
    copy = tmp_path / "copy"
    shutil.copytree(out, copy)
    victim = manifest["parts"][1]["part"]
    (copy / victim).unlink()
    assert main(["report", str(copy), "--to", str(tmp_path / "r.html")]) == 2
    assert victim in capsys.readouterr().err
    assert main(["report", str(out), "--to", str(tmp_path / "r.html"),
                 "--sample-rows", "-1"]) == 2
    assert "--sample-rows" in capsys.readouterr().err
    assert main(["report", str(out), "--to", str(tmp_path / "no" / "r.html")]) == 2
    assert "does not exist" in capsys.readouterr().err


def test_importing_annotator_does_not_load_matplotlib():
    code = ("import sys, annotator, annotator.cli, annotator.report, annotator.commands.report;"
            "assert 'matplotlib' not in sys.modules, 'matplotlib imported'")
    subprocess.run([sys.executable, "-c", code], check=True)


# ---------------------------------------------------------------------- a real browser
def _browser_missing() -> str | None:
    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # tests/browser_driver.py
    from browser_driver import missing

    return missing()


@pytest.mark.browser
@pytest.mark.skipif(_browser_missing() is not None, reason=str(_browser_missing()))
def test_loads_in_a_headless_browser(full):
    """What a person sees in Chromium: the title, the row count, every figure decoded (an
    image that failed to decode has naturalWidth 0), and no request beyond the file itself."""
    from browser_driver import browser, visible_text, wait_for
    from selenium.webdriver.common.by import By

    _, report, _, manifest = full
    with browser() as driver:
        driver.get(report.resolve().as_uri())
        wait_for(lambda: driver.execute_script("return document.readyState") == "complete",
                 "the report to load")
        text = visible_text(driver)
        assert "Annotation report" in text
        assert driver.find_elements(By.CSS_SELECTOR, '[data-figure="sky-map"]')
        assert driver.find_elements(By.CSS_SELECTOR,
                                    f'[data-value="{manifest["rows_read"]}"]')
        images = driver.find_elements(By.TAG_NAME, "img")
        assert images
        widths = [driver.execute_script("return arguments[0].naturalWidth", im) for im in images]
        assert all(w > 0 for w in widths), widths
        loaded = driver.execute_script(
            "return performance.getEntriesByType('resource').map(e => e.name)")
        assert loaded == [], loaded  # self-contained: nothing fetched beyond the page
