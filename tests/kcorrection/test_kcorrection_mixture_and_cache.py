"""The two-template mixture on the demo survey's curves (issue 13) and the on-disk table cache
(issue 17)."""

from __future__ import annotations

import multiprocessing
import os
import pickle
from pathlib import Path

import numpy as np
import pytest

from annotator_plugins.kcorrection import cache
from annotator_plugins.kcorrection.methods import Template, TemplateMix
from annotator_plugins.kcorrection.synthetic import ab_maggies, filter_support, \
    pivot_wavelength
from annotator_plugins.kcorrection.tables import Curve, Filter

SAMPLES = Path(__file__).resolve().parents[2] / "sample_catalogues"


def _read(path: Path) -> tuple[np.ndarray, np.ndarray]:
    data = np.loadtxt(path, delimiter=",", skiprows=1)
    return data[:, 0].copy(), data[:, 1].copy()


def demo_filter(band: str) -> Filter:
    w, r = _read(SAMPLES / "filters" / f"{band}.csv")
    return Filter(w, r, f"filters/{band}.csv", "test", support=filter_support(w, r),
                  pivot_A=pivot_wavelength(w, r))


def demo_sed(name: str) -> Curve:
    w, f = _read(SAMPLES / "seds" / f"{name}.csv")
    return Curve(w, f, f"seds/{name}.csv", "test")


def demo_mix(clip: float = 0.1, z_max: float = 3.5, tolerance: float = 1e-4,
             spread: float = 0.5) -> TemplateMix:
    amber, infrared = demo_filter("amber"), demo_filter("infrared")
    return TemplateMix.build((demo_sed("early"), demo_sed("starforming")), amber, amber,
                             ("amber", "infrared"), (amber, infrared), z_max, "test",
                             tolerance, clip, spread)


def small_mix() -> TemplateMix:
    """A cheaper table for the cache tests."""
    return demo_mix(z_max=1.0, tolerance=1e-3)


@pytest.fixture(scope="module")
def shared_cache(tmp_path_factory):
    return tmp_path_factory.mktemp("ktables_shared")


@pytest.fixture(autouse=True)
def cache_folder(shared_cache, monkeypatch):
    """The demo tables are built once for this module, in a folder of its own."""
    monkeypatch.setenv(cache.ENV_DIR, str(shared_cache))


@pytest.fixture
def private_cache(tmp_path, monkeypatch):
    monkeypatch.setenv(cache.ENV_DIR, str(tmp_path / "ktables"))
    return tmp_path / "ktables"


def _direct_colour_and_k(sed: Curve, z: float) -> tuple[float, float]:
    """amber - infrared and K_amber of an SED at z by direct synthetic photometry (Hogg et
    al. 2002 eqs. 2 and 9; AB as in Oke & Gunn 1983)."""
    a, i = demo_filter("amber"), demo_filter("infrared")
    fa = ab_maggies(sed.wave, sed.value, a.wave, a.value, z)
    fi = ab_maggies(sed.wave, sed.value, i.wave, i.value, z)
    f0 = ab_maggies(sed.wave, sed.value, a.wave, a.value, 0.0)
    return -2.5 * np.log10(fa / fi), -2.5 * np.log10(fa / f0)


def test_issue_case_blue_starforming_galaxy_at_z_2_24_is_not_given_the_early_k():
    # Issue 13: a spectroscopic star-forming galaxy at z = 2.24 with amber - infrared = 0.23,
    # bluer than the star-forming template (about 0.40 there), used to get the early
    # template's K = 6.44. It lies 0.17 mag beyond the star-forming colour: with the default
    # tolerance (0.1 mag) it is refused (null, flagged); with a 0.2 mag tolerance it gets
    # the star-forming template's K (direct synthetic photometry), flagged colour_clipped
    # (its colour -+ 0.05 mag lies beyond the star-forming colour too, so K is determined).
    c_sf, k_sf = _direct_colour_and_k(demo_sed("starforming"), 2.24)
    _, k_early = _direct_colour_and_k(demo_sed("early"), 2.24)
    assert 0.35 < c_sf < 0.45 and k_early > 6  # the case as the issue describes it
    z, c = np.array([2.24]), np.array([0.23])
    k, flags = demo_mix().evaluate(z, c)
    assert np.isnan(k[0]) and flags["colour_outside_range"][0]
    assert not flags["colour_clipped"][0]
    k, flags = demo_mix(clip=0.2).evaluate(z, c)
    assert k[0] == pytest.approx(k_sf, abs=2e-4)
    assert flags["colour_clipped"][0] and not flags["colour_outside_range"][0]


def test_mixture_colour_is_monotonic_in_the_weight_at_every_redshift():
    # c(w) = -2.5 log10(F_p(w) / F_q(w)) with F linear in w: strictly monotonic between the
    # two templates' colours (closed form, see TemplateMix); checked on a grid of w and z.
    mix = demo_mix(spread=1e9)
    z = np.linspace(0.0, 3.5, 141)
    sol = mix.solve(z, np.zeros_like(z))
    (a_p, b_p), (a_q, b_q) = sol.fluxes["p"], sol.fluxes["q"]
    w = np.linspace(0.0, 1.0, 201)[:, None]
    c = -2.5 * np.log10((a_p + w * (b_p - a_p)) / (a_q + w * (b_q - a_q)))
    steps = np.diff(c, axis=0)
    assert np.all((steps < 0).all(axis=0) | (steps > 0).all(axis=0))
    # and the mixture inverts it: every colour on that curve gives back its weight
    for j in (0, 40, 90, 140):
        colours = c[:, j]
        got = mix.solve(np.full(colours.size, z[j]), colours).w
        np.testing.assert_allclose(got, w[:, 0], atol=1e-9)


def test_mixture_refuses_outside_and_flags_every_clipped_row():
    mix = demo_mix(spread=1e9)
    z = np.array([0.5, 1.5, 2.5, 3.2])
    c_a, c_b = mix.template_colours(z)
    lo, hi = np.minimum(c_a, c_b), np.maximum(c_a, c_b)
    for delta, kept, flag in ((0.05, True, "colour_clipped"),
                              (0.15, False, "colour_outside_range")):
        for colour in (lo - delta, hi + delta):
            k, flags = mix.evaluate(z, colour)
            assert np.isfinite(k).all() == kept and (np.isnan(k).all() or kept)
            assert flags[flag].all()
    k, flags = mix.evaluate(z, 0.5 * (lo + hi))
    assert np.isfinite(k).all() and not any(flags[f].any() for f in flags)


def test_mixture_refuses_where_the_colour_cannot_fix_k():
    # dK/dc = (dF_R / F_R) / (dF_p / F_p - dF_q / F_q) (closed form, TemplateMix) against a
    # central difference of K in the colour (common practice); then the refusal: K of the
    # colour +- its error (here 0.1 mag) spanning more than 0.5 mag, from K evaluated there.
    loose = demo_mix(spread=1e9)
    z = np.array([0.3, 0.8, 1.2, 2.24, 3.0])
    c_a, c_b = loose.template_colours(z)
    colour = c_b + 0.02 * (c_a - c_b)  # near the star-forming template's colour
    h = 1e-4
    fd = (loose.evaluate(z, colour + h)[0] - loose.evaluate(z, colour - h)[0]) / (2 * h)
    np.testing.assert_allclose(loose.solve(z, colour).sensitivity, fd, rtol=1e-3)
    # below 1 mag of K per mag of colour at z = 0.3, above 10 near z = 2.24 (docs)
    assert abs(fd[0]) < 1 and abs(fd[3]) > 10
    err = np.full(z.size, 0.1)
    lo, hi = np.minimum(c_a, c_b), np.maximum(c_a, c_b)
    k_plus = loose.evaluate(z, np.clip(colour + 0.1, lo, hi))[0]
    k_minus = loose.evaluate(z, np.clip(colour - 0.1, lo, hi))[0]
    expect = np.abs(k_plus - k_minus) > 0.5
    assert expect.tolist() == [False, False, False, True, True]
    np.testing.assert_allclose(loose.solve(z, colour, err).spread, np.abs(k_plus - k_minus),
                               atol=1e-6)
    k, flags = demo_mix().evaluate(z, colour, err)
    assert flags["colour_insensitive"].tolist() == expect.tolist()
    assert np.isnan(k[expect]).all() and np.isfinite(k[~expect]).all()


def test_derivatives_reuse_the_weights_found_by_evaluate(monkeypatch):
    mix = demo_mix()
    z = np.linspace(0.1, 3.0, 50)
    c_a, c_b = mix.template_colours(z)
    colour = 0.3 * c_a + 0.7 * c_b
    calls = []
    real = TemplateMix.solve
    monkeypatch.setattr(TemplateMix, "solve", lambda self, *a: calls.append(1) or real(self, *a))
    mix.evaluate(z, colour)
    mix.derivatives(z, colour)
    assert len(calls) == 1
    fresh = pickle.loads(pickle.dumps(mix))  # a Dask worker's copy starts without the memo
    np.testing.assert_array_equal(fresh.derivatives(z, colour)[1], mix.derivatives(z, colour)[1])


# ------------------------------------------------------------------------------- cache

def test_cached_table_is_bit_identical_to_a_fresh_one(private_cache, monkeypatch):
    first = small_mix()  # builds and stores
    assert len(list(private_cache.glob("*" + cache.SUFFIX))) == 1
    second = small_mix()  # read back
    monkeypatch.setenv(cache.ENV_DIR, "off")
    fresh = small_mix()
    for t in (first.table, second.table):
        assert t.grid.n == fresh.table.grid.n and t.grid.z_max == fresh.table.grid.z_max
        assert t.max_error == fresh.table.max_error
        np.testing.assert_array_equal(t.values, fresh.table.values)
    z = np.random.default_rng(1).uniform(0, 1.0, 1000)
    c_a, c_b = fresh.template_colours(z)
    colour = 0.5 * (c_a + c_b)
    for a, b in zip(second.evaluate(z, colour)[0:1] + second.derivatives(z, colour),
                    fresh.evaluate(z, colour)[0:1] + fresh.derivatives(z, colour)):
        assert np.array_equal(a, b, equal_nan=True)


def test_key_depends_on_curve_values_and_settings_not_on_names():
    sed = demo_sed("early")
    f = demo_filter("amber")
    parts = {"method": "template", "sed": sed, "filter": f, "rest": f, "z_max": 3.0,
             "tolerance": 1e-4}
    renamed = dict(parts, sed=Curve(sed.wave, sed.value, "elsewhere/other.csv", "x"))
    assert cache.table_key(parts) == cache.table_key(renamed)
    changed = Curve(sed.wave, sed.value * (1 + 1e-12), sed.path, sed.key)
    for other in (dict(parts, sed=changed), dict(parts, z_max=3.0000001),
                  dict(parts, tolerance=2e-4)):
        assert cache.table_key(other) != cache.table_key(parts)


@pytest.mark.parametrize("damage", ["truncate", "garbage", "other_key"])
def test_corrupt_entry_is_ignored_and_rebuilt(private_cache, damage):
    good = small_mix()
    (entry,) = private_cache.glob("*" + cache.SUFFIX)
    raw = entry.read_bytes()
    if damage == "truncate":
        entry.write_bytes(raw[: len(raw) // 2])
    elif damage == "garbage":
        entry.write_bytes(raw[:200] + bytes(reversed(raw[200:400])) + raw[400:])
    else:
        other = Template.build(demo_sed("early"), demo_filter("amber"), demo_filter("amber"),
                               1.0, "test", 1e-3)
        assert other is not None
        (o,) = [p for p in private_cache.glob("*" + cache.SUFFIX) if p != entry]
        os.replace(o, entry)  # a sound file, but stored under the wrong name
    again = small_mix()
    np.testing.assert_array_equal(again.table.values, good.table.values)
    assert cache.load(entry, entry.name.removesuffix(cache.SUFFIX)) is not None  # rewritten


def test_eviction_keeps_the_folder_under_its_bound(tmp_path):
    folder = tmp_path / "c"
    for i in range(5):
        cache.store(folder, f"k{i}", np.full((2, 1000), float(i)), 1000, 1.0, 0.0)
        os.utime(folder / f"k{i}{cache.SUFFIX}", (1000 + i, 1000 + i))
    one = (folder / f"k0{cache.SUFFIX}").stat().st_size
    cache.evict(folder, 2 * one + 10)
    assert sorted(p.name for p in folder.glob("*" + cache.SUFFIX)) == \
        [f"k3{cache.SUFFIX}", f"k4{cache.SUFFIX}"]  # the least recently used went first


def _build_in_child(folder: str) -> bytes:
    os.environ[cache.ENV_DIR] = folder
    return small_mix().table.values.tobytes()


def test_concurrent_builders_agree_and_leave_one_sound_entry(private_cache):
    # Several processes build and store the same table at once (as Dask workers would).
    ctx = multiprocessing.get_context("spawn")
    with ctx.Pool(3) as pool:
        results = pool.map(_build_in_child, [str(private_cache)] * 3)
    assert len(set(results)) == 1
    entries = list(private_cache.glob("*" + cache.SUFFIX))
    assert len(entries) == 1 and not list(private_cache.glob(".tmp-*"))
    key = entries[0].name.removesuffix(cache.SUFFIX)
    assert cache.load(entries[0], key)[0].tobytes() == results[0]
