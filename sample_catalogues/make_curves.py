"""Write the invented filter curves and SED templates of the Quillfield survey.

Everything here is made up from simple analytic pieces (logistic edges, a smooth detector
curve, Planck-like blackbody sums, power laws, smooth breaks and Gaussian lines); none of it is
a copy of a real instrument's filter or of a published template.  The committed files in
``filters/`` and ``seds/`` are the output of::

    python sample_catalogues/make_curves.py

which is deterministic (no random numbers), so running it again reproduces them byte for byte.

Filters are photon-counting responses (the probability that a photon of wavelength lambda
reaching the telescope is counted), sampled every 5 Angstrom from 3000 to 11000 Angstrom.
SEDs are f_lambda in an arbitrary scale on a logarithmic grid from 500 to 30000 Angstrom, which
keeps every band covered in the rest frame up to z = 3 (3000 / 4 = 750 Angstrom).
"""

from __future__ import annotations

import argparse
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent

FILTER_STEP_ANGSTROM = 5.0
FILTER_RANGE_ANGSTROM = (3000.0, 11000.0)
SED_RANGE_ANGSTROM = (500.0, 30000.0)
SED_POINTS = 5000

# Band name -> (blue edge, red edge, edge softness) of the interference filter, Angstrom.
# The bands are named after colours, not after any real photometric system.
BAND_EDGES = {
    "violet": (3420.0, 4180.0, 40.0),
    "cyan": (4230.0, 5450.0, 35.0),
    "amber": (5520.0, 6880.0, 35.0),
    "crimson": (6950.0, 8350.0, 40.0),
    "infrared": (8420.0, 10300.0, 55.0),
}
# Peak transmission of each filter glass (invented).
BAND_PEAK = {"violet": 0.86, "cyan": 0.93, "amber": 0.95, "crimson": 0.94, "infrared": 0.92}

# Planck constant x speed of light / Boltzmann constant in Angstrom Kelvin (CODATA, rounded).
HC_OVER_K_ANGSTROM_K = 1.438777e8


def _logistic(x: np.ndarray) -> np.ndarray:
    return 0.5 * (1.0 + np.tanh(0.5 * x))


def atmosphere(wl: np.ndarray) -> np.ndarray:
    """Invented sky transmission at the (invented) Mount Orrin site: a smooth ultraviolet
    cut-off near 3300 Angstrom and a gentle scattering slope; no absorption bands."""
    cutoff = _logistic((wl - 3300.0) / 45.0)
    scattering = np.exp(-0.12 * (4000.0 / wl) ** 4)
    return cutoff * scattering


def detector(wl: np.ndarray) -> np.ndarray:
    """Invented mirror x optics x detector efficiency: broad, peaking near 6000 Angstrom and
    falling in the near infrared as the (invented) sensor becomes transparent."""
    return 0.88 * np.exp(-0.5 * ((wl - 6000.0) / 3300.0) ** 4)


def filter_response(band: str, wl: np.ndarray) -> np.ndarray:
    """Photon-counting response of one band: filter glass x detector x atmosphere."""
    lo, hi, soft = BAND_EDGES[band]
    glass = BAND_PEAK[band] * _logistic((wl - lo) / soft) * _logistic((hi - wl) / soft)
    # A slight tilt across the pass band, as a real coating would have (sign invented).
    glass *= 1.0 + 0.04 * (wl - 0.5 * (lo + hi)) / (hi - lo)
    response = glass * detector(wl) * atmosphere(wl)
    response[response < 1e-5 * response.max()] = 0.0
    return response


def planck_lambda(wl: np.ndarray, temperature_k: float) -> np.ndarray:
    """Blackbody shape B_lambda(T) in arbitrary units (normalised to 1 at 5500 Angstrom)."""
    def shape(w):
        return w ** -5.0 / np.expm1(HC_OVER_K_ANGSTROM_K / (w * temperature_k))
    return shape(wl) / shape(np.array(5500.0))


def smooth_break(wl: np.ndarray, at: float, width: float, depth: float) -> np.ndarray:
    """1 redward of ``at``; ``1 - depth`` blueward, joined smoothly over ``width``."""
    return 1.0 - depth * (1.0 - _logistic((wl - at) / width))


def gaussian_lines(wl: np.ndarray, lines: list[tuple[float, float, float]]) -> np.ndarray:
    """Sum of Gaussians (centre, sigma, amplitude), all in Angstrom / relative units."""
    out = np.zeros_like(wl)
    for centre, sigma, amplitude in lines:
        out += amplitude * np.exp(-0.5 * ((wl - centre) / sigma) ** 2)
    return out


def lyman_break(wl: np.ndarray) -> np.ndarray:
    """Almost nothing escapes blueward of the Lyman limit (912 Angstrom): keep 0.5 %."""
    return smooth_break(wl, 912.0, 8.0, 0.995)


def sed_early(wl: np.ndarray) -> np.ndarray:
    """An old, red population: two cool blackbodies, a deep 4000 Angstrom break, a second
    drop in the mid ultraviolet, a few invented absorption dips, nothing blueward of 912."""
    f = 0.65 * planck_lambda(wl, 4300.0) + 0.35 * planck_lambda(wl, 6200.0)
    f *= smooth_break(wl, 4000.0, 40.0, 0.55)
    f *= smooth_break(wl, 2800.0, 120.0, 0.55)
    f *= 1.0 - gaussian_lines(wl, [(3934.0, 8.0, 0.25), (3969.0, 8.0, 0.22),
                                    (5175.0, 15.0, 0.10), (5893.0, 10.0, 0.08)])
    f += 0.004 * (wl / 1500.0) ** -1.5  # a weak ultraviolet upturn from hot old stars
    return f * lyman_break(wl)


def sed_intermediate(wl: np.ndarray) -> np.ndarray:
    """A mixed population: a warm blackbody plus a blue power law, a moderate 4000 Angstrom
    break and weak emission lines."""
    f = 0.6 * planck_lambda(wl, 5200.0) \
        + 0.4 * (wl / 5500.0) ** -1.3 * _logistic((wl - 1000.0) / 60.0)
    f *= smooth_break(wl, 4000.0, 50.0, 0.28)
    f *= smooth_break(wl, 1300.0, 150.0, 0.3)
    lines = [(3727.0, 6.0, 0.35), (4861.0, 6.0, 0.15), (5007.0, 6.0, 0.2), (6563.0, 7.0, 0.6)]
    continuum_55 = np.interp(5500.0, wl, f)
    f += continuum_55 * gaussian_lines(wl, lines)
    return f * lyman_break(wl)


def sed_starforming(wl: np.ndarray) -> np.ndarray:
    """A young, blue population: an ultraviolet-rising power law (f_lambda ~ lambda^-2.2)
    turning over into a hot blackbody in the red, a small Balmer break and strong lines."""
    f = (wl / 1500.0) ** -2.2 * _logistic((wl - 1000.0) / 60.0) \
        + 0.12 * planck_lambda(wl, 9000.0)
    f *= smooth_break(wl, 3650.0, 60.0, 0.10)
    continuum_50 = np.interp(5000.0, wl, f)
    lines = [(1216.0, 4.0, 18.0), (3727.0, 5.0, 3.0), (4861.0, 5.0, 1.4),
             (4959.0, 5.0, 1.2), (5007.0, 5.0, 3.6), (6563.0, 6.0, 4.2), (6583.0, 6.0, 0.8)]
    f += continuum_50 * gaussian_lines(wl, lines)
    return f * lyman_break(wl)


SEDS = {"early": sed_early, "intermediate": sed_intermediate, "starforming": sed_starforming}


def filter_grid() -> np.ndarray:
    lo, hi = FILTER_RANGE_ANGSTROM
    return np.arange(lo, hi + FILTER_STEP_ANGSTROM / 2, FILTER_STEP_ANGSTROM)


def sed_grid() -> np.ndarray:
    lo, hi = SED_RANGE_ANGSTROM
    return np.geomspace(lo, hi, SED_POINTS)


def write_curves(out_dir: Path = HERE) -> list[Path]:
    """Write ``filters/<band>.csv`` and ``seds/<name>.csv`` under ``out_dir``."""
    written = []
    (out_dir / "filters").mkdir(parents=True, exist_ok=True)
    (out_dir / "seds").mkdir(parents=True, exist_ok=True)
    wl = filter_grid()
    for band in BAND_EDGES:
        path = out_dir / "filters" / f"{band}.csv"
        rows = "".join(f"{w:.1f},{r:.6f}\n" for w, r in zip(wl, filter_response(band, wl)))
        path.write_text("wavelength_angstrom,response\n" + rows)
        written.append(path)
    wl = sed_grid()
    for name, make in SEDS.items():
        f = make(wl)
        f = f / np.interp(5500.0, wl, f)  # arbitrary scale: 1 at 5500 Angstrom
        path = out_dir / "seds" / f"{name}.csv"
        rows = "".join(f"{w:.4f},{v:.6e}\n" for w, v in zip(wl, f))
        path.write_text("wavelength_angstrom,flambda\n" + rows)
        written.append(path)
    return written


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=HERE,
                        help="folder to write filters/ and seds/ into (default: beside this file)")
    args = parser.parse_args(argv)
    for path in write_curves(args.out):
        print(path)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
