"""Absolute magnitudes recovered from a generated catalogue, compared with its truth.

A catalogue written with ``generate.py --truth`` carries, beside the observations, each
galaxy's true rest-frame absolute magnitudes (computed by direct synthetic photometry of the
SED it was drawn from; Hogg et al. 2002, astro-ph/0210394, eqs. 8, 9 and 13, AB magnitudes as
in Oke & Gunn 1983, ApJ 266, 713). Here every K-correction method of the ``kcorrection``
plugin is built with the survey's own filter and SED files and applied to the *observed*
magnitudes and redshifts exactly as the annotator does (``M = m - mu(z) - K``), and
``dM = M_recovered - M_true`` is summarised per method, redshift type (spec / phot), SED type
and redshift bin: median and NMAD (1.4826 x median absolute deviation; robust), mean and
standard deviation, the catastrophic fraction ``|dM| > 1 mag`` and the fraction the method
refused (null K with a flag).

Used by ``tests/samples/test_recovery.py`` (fast sizes, with bounds) and
``benchmarks/bench_recovery.py`` (full sizes, the table in docs/absolute-magnitudes.md).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa

from annotator.cosmology import preset
from annotator_plugins.kcorrection.methods import (
    Method, PowerLawFromColour, Template, TemplateMix,
)
from annotator_plugins.kcorrection.synthetic import filter_support, pivot_wavelength
from annotator_plugins.kcorrection.tables import Curve, Filter

HERE = Path(__file__).resolve().parent
SED_TYPES = ("early", "intermediate", "starforming")
#: Redshift bins (on the observed redshift) of the recovery table.
Z_BINS = (0.0, 0.25, 0.5, 1.0, 1.5, 2.0, 2.5, 3.0, 3.5)
CATASTROPHIC_MAG = 1.0
Z_MAX = 3.5  # as the demo job


def _read(path: Path) -> tuple[np.ndarray, np.ndarray]:
    data = np.loadtxt(path, delimiter=",", skiprows=1)
    return data[:, 0].copy(), data[:, 1].copy()


def survey_filter(band: str) -> Filter:
    w, r = _read(HERE / "filters" / f"{band}.csv")
    return Filter(w, r, f"filters/{band}.csv", "recovery", support=filter_support(w, r),
                  pivot_A=pivot_wavelength(w, r))


def survey_sed(name: str) -> Curve:
    w, f = _read(HERE / "seds" / f"{name}.csv")
    return Curve(w, f, f"seds/{name}.csv", "recovery")


@dataclass
class Case:
    """One way of getting rest-frame amber absolute magnitudes."""

    name: str
    observed_band: str  # the magnitude used
    methods: dict[str, Method]  # SED type -> method ("*" for all rows)
    #: (SED types, z range) where the method is claimed valid (bounds asserted there).
    valid_types: tuple[str, ...]
    valid_z: tuple[float, float]
    note: str


def build_cases(tolerance: float = 1e-4) -> list[Case]:
    amber, crimson, infrared = (survey_filter(b) for b in ("amber", "crimson", "infrared"))
    seds = {t: survey_sed(t) for t in SED_TYPES}
    colour = ("amber", "infrared")
    true_sed = {t: Template.build(seds[t], amber, amber, Z_MAX, "recovery", tolerance)
                for t in SED_TYPES}
    mix = TemplateMix.build((seds["early"], seds["starforming"]), amber, amber, colour,
                            (amber, infrared), Z_MAX, "recovery", tolerance)
    mix_crimson = TemplateMix.build((seds["early"], seds["starforming"]), crimson, amber,
                                    colour, (amber, infrared), Z_MAX, "recovery", tolerance)
    power = PowerLawFromColour.build(colour, amber, infrared, (-10.0, 10.0), Z_MAX, "recovery")
    return [
        Case("template, the object's own SED", "amber", true_sed, SED_TYPES, (0.0, 3.0),
             "the K of the SED each galaxy was drawn from: isolates noise and redshift errors"),
        Case("template_mix early+starforming, amber - infrared (demo job: amber)", "amber",
             {"*": mix}, ("early", "starforming"), (0.0, 3.0),
             "valid for SEDs the two templates span; intermediate galaxies are not a mixture "
             "of them"),
        Case("template_mix early+starforming, from crimson to rest amber (demo job: "
             "amber_from_crimson)", "crimson", {"*": mix_crimson}, ("early", "starforming"),
             (0.0, 3.0), "as above, observed crimson shifted to rest-frame amber"),
        Case("power_law_colour, amber - infrared", "amber", {"*": power}, (), (0.0, 0.0),
             "a power law through two bands: an approximation with no claimed validity; "
             "figures reported, no bound"),
    ]


def recover(table: pa.Table, cases: list[Case], cosmology: str = "planck2018") -> dict:
    """Per case: dM, refused mask and K flags for every row with a usable redshift."""
    cosmo = preset(cosmology)
    col = {n: table.column(n).to_numpy(zero_copy_only=False) for n in
           ("z", "z_type", "true_sed", "true_absolute_magnitude_amber_mag", "mag_amber",
            "mag_crimson", "mag_infrared", "magerr_amber", "magerr_infrared")}
    z = col["z"].astype(np.float64)
    with np.errstate(invalid="ignore"):
        usable = np.isfinite(z) & (z > 0)
    z = np.where(usable, z, np.nan)
    mu = np.asarray(cosmo.distance_modulus_mag(z), dtype=np.float64)
    colour = col["mag_amber"].astype(np.float64) - col["mag_infrared"].astype(np.float64)
    colour_err = np.hypot(col["magerr_amber"].astype(np.float64),
                          col["magerr_infrared"].astype(np.float64))
    out = {"z": z, "z_type": col["z_type"].astype(str), "sed": col["true_sed"].astype(str),
           "usable": usable, "cases": {}}
    truth = col["true_absolute_magnitude_amber_mag"]
    for case in cases:
        m = col[f"mag_{case.observed_band}"].astype(np.float64)
        k = np.full(z.size, np.nan)
        refused = np.zeros(z.size, dtype=bool)
        for sed, method in case.methods.items():
            rows = np.ones(z.size, dtype=bool) if sed == "*" else out["sed"] == sed
            if isinstance(method, TemplateMix):  # as the annotator: with the colour's error
                kk, flags = method.evaluate(z[rows], colour[rows], colour_err[rows])
            else:
                kk, flags = method.evaluate(z[rows], colour[rows])
            k[rows] = kk
            null_flags = [f for f in flags if f != "colour_clipped"]
            refused[rows] = np.any([flags[f] for f in null_flags], axis=0) & ~np.isfinite(kk)
        with np.errstate(invalid="ignore"):
            dm = (m - mu - k) - truth
        out["cases"][case.name] = {"dm": dm, "refused": refused & usable}
    return out


def _stats(dm: np.ndarray, refused: np.ndarray) -> dict:
    good = dm[np.isfinite(dm)]
    n_all = int(dm.size)
    row = {"rows": n_all, "refused": int(refused.sum()), "valid": int(good.size)}
    if good.size:
        med = float(np.median(good))
        row.update(median=med, nmad=float(1.4826 * np.median(np.abs(good - med))),
                   mean=float(good.mean()), std=float(good.std()),
                   catastrophic=float(np.mean(np.abs(good) > CATASTROPHIC_MAG)))
    else:
        row.update(median=math.nan, nmad=math.nan, mean=math.nan, std=math.nan,
                   catastrophic=math.nan)
    return row


def summarise(result: dict, cases: list[Case]) -> list[dict]:
    """Rows of the recovery table: per case, z type, SED type (and 'all'), redshift bin."""
    rows = []
    z, zt, sed = result["z"], result["z_type"], result["sed"]
    for case in cases:
        data = result["cases"][case.name]
        for z_type in ("spec", "phot"):
            for s in ("all",) + SED_TYPES:
                sel_base = result["usable"] & (zt == z_type) & ((sed == s) if s != "all"
                                                                else True)
                for lo, hi in zip(Z_BINS[:-1], Z_BINS[1:]):
                    with np.errstate(invalid="ignore"):
                        sel = sel_base & (z >= lo) & (z < hi)
                    if not sel.any():
                        continue
                    # claims (and bounds) for spectroscopic redshifts only: a wrong photometric
                    # redshift misleads every K method alike and none can detect it
                    valid = z_type == "spec" and s in case.valid_types \
                        and case.valid_z[0] <= lo and hi <= case.valid_z[1]
                    row = {"case": case.name, "z_type": z_type, "sed": s, "z_lo": lo,
                           "z_hi": hi, "claimed_valid": bool(valid)}
                    row.update(_stats(data["dm"][sel], data["refused"][sel]))
                    rows.append(row)
    return rows


def format_table(rows: list[dict], *, only_sed: tuple[str, ...] | None = None) -> str:
    head = (f"{'z type':6} {'SED':12} {'z bin':9} {'rows':>7} {'refused':>7} {'median':>8} "
            f"{'NMAD':>6} {'mean':>8} {'std':>6} {'cat.%':>6} valid")
    lines = []
    current = None
    for r in rows:
        if only_sed and r["sed"] not in only_sed:
            continue
        if r["case"] != current:
            current = r["case"]
            lines += ["", current, head]
        lines.append(
            f"{r['z_type']:6} {r['sed']:12} {r['z_lo']:.2f}-{r['z_hi']:<4.2f} {r['rows']:7d} "
            f"{r['refused']:7d} {r['median']:8.4f} {r['nmad']:6.3f} {r['mean']:8.4f} "
            f"{r['std']:6.3f} {100 * r['catastrophic']:6.2f} "
            f"{'yes' if r['claimed_valid'] else '-'}")
    return "\n".join(lines)
