"""The public :class:`Cosmology` object."""

from __future__ import annotations

import math
import numbers
import threading
from collections.abc import Mapping, Sequence

import numpy as np

from . import constants as k
from ._background import Background
from ._build import EXT_WIDTH, U_MAX, Tables

from .errors import CosmologyError

# Tables are refined (grid spacing halved, up to MAX_REFINE times) until their measured
# interpolation error is below ERROR_BUDGET; only near-pathological models (e.g. an
# expansion that nearly stalls) ever need it.  A model still above the budget after the
# last refinement is refused (CosmologyError naming its parameters): the engine never
# returns numbers it has measured to be wrong.  Level 4 (16 times the base density)
# costs about 0.1 s; the models it cannot tabulate are within ~1e-5 of a bounce
# (E^2 at its minimum below ~1e-5), see docs/cosmology-accuracy.md.
ERROR_BUDGET = 5e-9
MAX_REFINE = 4

PARAMETERS = ("h0", "omega_m", "omega_de", "omega_b", "t_cmb", "n_eff", "m_nu", "w0", "wa")
DICT_KEYS = ("preset", "name") + PARAMETERS

# Allowed ranges: (low, high, low inclusive, high inclusive, unit/description).
RANGES = {
    "h0": (0.0, 1000.0, False, True, "km/s/Mpc"),
    "omega_m": (0.0, 10.0, True, True, ""),
    "omega_de": (0.0, 10.0, True, True, "(or None for a flat model)"),
    "omega_b": (0.0, None, True, True, ""),  # upper bound is omega_m
    "t_cmb": (0.0, 100.0, True, True, "K"),
    "n_eff": (0.0, 20.0, True, True, ""),
    "m_nu": (0.0, 10.0, True, True, "eV per species"),
    "w0": (-3.0, 1.0, True, True, ""),
    "wa": (-3.0, 3.0, True, True, ""),
}

_CHUNK = 16384


def _range_text(name, hi_label=None):
    lo, hi, lo_inc, hi_inc, unit = RANGES[name]
    hi_txt = hi_label if hi_label is not None else f"{hi:g}"
    text = f"{'[' if lo_inc else '('}{lo:g}, {hi_txt}{']' if hi_inc else ')'}"
    return f"{text} {unit}".strip()


def _number(name, value, hi_override=None, hi_label=None):
    """Validate one real parameter against RANGES (hi_override replaces the upper
    bound, hi_label is how it is shown); returns a float."""
    rng = _range_text(name, hi_label)
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Real):
        raise CosmologyError(
            f"{name} must be a real number in {rng}; got {value!r} ({type(value).__name__})",
            parameter=name,
        )
    v = float(value)
    lo, hi, lo_inc, hi_inc, _ = RANGES[name]
    if hi_override is not None:
        hi = hi_override
    ok = math.isfinite(v) and (v >= lo if lo_inc else v > lo) and (v <= hi if hi_inc else v < hi)
    if not ok:
        raise CosmologyError(f"{name} must be in {rng}; got {v!r}", parameter=name)
    return v


class Cosmology:
    """A homogeneous FLRW background: distances, times, horizons, their inverses.

    Parameters
    ----------
    h0 : Hubble constant today, km/s/Mpc.
    omega_m : cold dark matter + baryons today (massive neutrinos excluded).
    omega_de : dark energy today; ``None`` (default) makes the model flat, with dark
        energy closing the budget.  Curvature is
        ``omega_k = 1 - omega_m - omega_de - omega_radiation - omega_nu``.
    omega_b : baryons today (part of omega_m; the background does not use it).
    t_cmb : CMB temperature today, K; 0 switches photons and relic neutrinos off.
    n_eff : effective number of neutrino species.
    m_nu : masses in eV, either empty (all species massless) or one per species,
        ``floor(n_eff)`` of them, each carrying n_eff/len(m_nu) of the radiation
        weight; massive ones follow Komatsu et al. 2011 eq. (26).
    w0, wa : dark-energy equation of state w(a) = w0 + wa (1 - a)
        (Chevallier & Polarski 2001; Linder 2003).
    name : free label (not part of equality).

    All quantity methods take any-shape array-likes and return float64 arrays of the
    same shape (a numpy scalar for scalar input).  NaN, +-inf and negative redshifts
    give NaN; redshifts beyond ``z_max_tabulated`` (about 1e10) give NaN.
    """

    CosmologyError = CosmologyError  # also reachable as cosmo.CosmologyError

    __slots__ = ("_h0", "_omega_m", "_omega_de_in", "_omega_b", "_t_cmb", "_n_eff", "_m_nu",
                 "_w0", "_wa", "_name", "_bg", "_tables", "_lock", "__weakref__")

    def __init__(self, h0=70.0, omega_m=0.3, omega_de=None, omega_b=0.0, t_cmb=0.0,
                 n_eff=3.046, m_nu=(), w0=-1.0, wa=0.0, name=None):
        self._h0 = _number("h0", h0)
        self._omega_m = _number("omega_m", omega_m)
        self._omega_de_in = None if omega_de is None else _number("omega_de", omega_de)
        self._omega_b = _number("omega_b", omega_b, hi_override=self._omega_m,
                                hi_label=f"omega_m={self._omega_m:g}")
        self._t_cmb = _number("t_cmb", t_cmb)
        self._n_eff = _number("n_eff", n_eff)
        self._m_nu = self._check_m_nu(m_nu)
        self._w0 = _number("w0", w0)
        self._wa = _number("wa", wa)
        if self._w0 + self._wa > 0.0:
            raise CosmologyError(
                "wa: w0 + wa (the dark-energy equation of state at early times) must be <= 0, "
                "so that dark energy never dominates the early universe; got w0 + wa = "
                f"{self._w0 + self._wa:g}",
                parameter="wa",
            )
        if name is not None and not isinstance(name, str):
            raise CosmologyError(f"name must be a string or None; got {type(name).__name__}",
                                 parameter="name")
        self._name = name
        self._bg = Background(h0=self._h0, omega_m=self._omega_m, omega_de=self._omega_de_in,
                              t_cmb=self._t_cmb, n_eff=self._n_eff, m_nu=self._m_nu,
                              w0=self._w0, wa=self._wa)
        if self._bg.omega_de < 0.0:
            raise CosmologyError(
                "omega_de must be in [0, 10] (or None for a flat model); a flat model with "
                "omega_m="
                f"{self._omega_m:g} (plus radiation {self._bg.omega_rad:.3g} and massive "
                f"neutrinos {self._bg.omega_nu:.3g}) would need omega_de="
                f"{self._bg.omega_de:.6g}; pass omega_de explicitly for a curved model",
                parameter="omega_de",
            )
        self._check_history()
        self._tables = None
        self._lock = threading.Lock()

    # ------------------------------------------------------------ validation
    def _check_m_nu(self, m_nu):
        if isinstance(m_nu, (str, bytes)) or not isinstance(m_nu, (Sequence, np.ndarray)):
            raise CosmologyError(
                f"m_nu must be a list of neutrino masses in eV (each in {_range_text('m_nu')}); "
                f"got {m_nu!r} ({type(m_nu).__name__})",
                parameter="m_nu",
            )
        masses = tuple(_number("m_nu", m) for m in list(m_nu))
        n_species = int(math.floor(self._n_eff))
        if masses and len(masses) != n_species:
            raise CosmologyError(
                f"m_nu must be empty or list floor(n_eff)={n_species} masses (one per "
                f"species); got {len(masses)}",
                parameter="m_nu",
            )
        if any(m > 0 for m in masses) and self._t_cmb == 0.0:
            raise CosmologyError(
                "m_nu needs t_cmb > 0 (in (0, 100] K): relic neutrino densities follow from "
                "the photon temperature",
                parameter="m_nu",
            )
        return masses

    def _check_history(self):
        """Refuse models that bounce (no big bang) or recollapse."""
        bg = self._bg
        x0 = -U_MAX - EXT_WIDTH
        p = bg.early_slope(x0)
        if not p > 1.0:
            raise CosmologyError(
                "this model has no hot big bang with a finite particle horizon: at early "
                "times H must grow faster than (1+z) (it needs omega_m > 0, radiation "
                "(t_cmb > 0) or dark energy with w0 + wa > -1/3; a pure de Sitter model "
                "has no big bang)"
            )
        recollapse, _, _ = bg.future_fate()
        xs = np.concatenate([np.linspace(x0, 0.0, 1601), np.linspace(0.0, 40.0, 1281)[1:]])
        lne2 = bg.ln_e2(xs)
        bad = ~np.isfinite(lne2)
        if np.any(bad):
            xb = float(xs[np.argmax(bad)])
            self._refuse(xb)
        # Look for a dip to zero between grid points near the minimum of (da/dt)^2.
        with np.errstate(over="ignore"):
            adot2 = np.exp(lne2 + 2.0 * xs)
        for part in (xs <= 0.0, xs >= 0.0):
            j = int(np.argmin(np.where(part, adot2, np.inf)))
            if adot2[j] < 0.05 and 0 < j < len(xs) - 1:
                try:
                    from scipy.optimize import minimize_scalar  # only for this rare search

                    res = minimize_scalar(bg.e2_linear, bounds=(xs[j - 1], xs[j + 1]),
                                          method="bounded", options={"xatol": 1e-10})
                    if res.fun <= 0.0:
                        self._refuse(float(res.x))
                except OverflowError:
                    pass
        if recollapse:
            raise CosmologyError(
                "this model recollapses: negative curvature (omega_k="
                f"{bg.omega_k:.6g}) eventually dominates the expansion; such models are "
                "not supported"
            )

    def _refuse(self, x):
        a = math.exp(x)
        if x < 0:
            raise CosmologyError(
                f"this model has no big bang: H^2 would be negative at z = {1 / a - 1:.4g} "
                "(the universe bounced from an earlier contraction); such models are not "
                "supported"
            )
        raise CosmologyError(
            f"this model recollapses: H^2 reaches zero when the scale factor is {a:.4g} "
            "times today's; such models are not supported"
        )

    # ----------------------------------------------------------- parameters
    h0 = property(lambda self: self._h0, doc="Hubble constant today, km/s/Mpc")
    omega_m = property(lambda self: self._omega_m, doc="CDM + baryons today")
    omega_b = property(lambda self: self._omega_b, doc="baryons today")
    t_cmb = property(lambda self: self._t_cmb, doc="CMB temperature today, K")
    n_eff = property(lambda self: self._n_eff, doc="effective number of neutrino species")
    m_nu = property(lambda self: self._m_nu, doc="neutrino masses, eV (tuple)")
    w0 = property(lambda self: self._w0)
    wa = property(lambda self: self._wa)
    name = property(lambda self: self._name)
    omega_de = property(lambda self: self._bg.omega_de, doc="dark energy today (closure "
                        "value for a flat model)")
    omega_k = property(lambda self: self._bg.omega_k)
    omega_gamma = property(lambda self: self._bg.omega_gamma)
    omega_radiation = property(lambda self: self._bg.omega_rad,
                               doc="photons + massless neutrinos today")
    omega_nu = property(lambda self: self._bg.omega_nu, doc="massive neutrinos today")
    flat_space = property(lambda self: self._bg.omega_k == 0.0)

    @property
    def hubble_distance_mpc(self):
        return k.C_KM_S / self._h0

    @property
    def hubble_time_gyr(self):
        return k.MPC_KM / self._h0 / k.GYR_S

    def _key(self):
        return (self._h0, self._omega_m, self._omega_de_in, self._omega_b, self._t_cmb,
                self._n_eff, self._m_nu, self._w0, self._wa)

    def __eq__(self, other):
        if not isinstance(other, Cosmology):
            return NotImplemented
        return self._key() == other._key()

    def __hash__(self):
        return hash(("Cosmology",) + self._key())

    def __repr__(self):
        parts = [f"{p}={getattr(self, '_' + p) if p != 'omega_de' else self._omega_de_in!r}"
                 for p in PARAMETERS]
        label = f"name={self._name!r}, " if self._name else ""
        return f"Cosmology({label}{', '.join(parts)})"

    def __getstate__(self):
        return self.to_dict()

    def __setstate__(self, state):
        self.__init__(**state)

    def to_dict(self):
        """JSON-serialisable parameters; ``Cosmology.from_dict(c.to_dict()) == c``."""
        return {
            "name": self._name,
            "h0": self._h0,
            "omega_m": self._omega_m,
            "omega_de": self._omega_de_in,
            "omega_b": self._omega_b,
            "t_cmb": self._t_cmb,
            "n_eff": self._n_eff,
            "m_nu": list(self._m_nu),
            "w0": self._w0,
            "wa": self._wa,
        }

    @classmethod
    def from_dict(cls, spec):
        """Build from a job-file ``[cosmology]`` table.

        Either the full parameter set, or ``preset = "<name>"`` plus any overrides.
        Parameters not given take the constructor defaults (omega_de absent = flat).
        """
        from .presets import _preset_params

        if not isinstance(spec, Mapping):
            raise CosmologyError(
                f"a cosmology specification must be a table/dict; got {type(spec).__name__}")
        unknown = [key for key in spec if key not in DICT_KEYS]
        if unknown:
            raise CosmologyError(
                f"unknown cosmology key {unknown[0]!r}; valid keys are: {', '.join(DICT_KEYS)}",
                parameter=str(unknown[0]),
            )
        params = dict(spec)
        preset_name = params.pop("preset", None)
        if preset_name is not None:
            base = _preset_params(preset_name)
            overrides = {key: v for key, v in params.items() if key != "name"}
            base.update(overrides)
            if "name" in params:
                base["name"] = params["name"]
            elif overrides:
                base["name"] = f"{preset_name} (modified: {', '.join(sorted(overrides))})"
            params = base
        return cls(**params)

    # ---------------------------------------------------------------- tables
    def _t(self):
        tab = self._tables
        if tab is None:
            with self._lock:
                if self._tables is None:
                    self._tables = _ScaledTables(self)
                tab = self._tables
        return tab

    def build(self):
        """Build the tables now (they are otherwise built on first use); returns self."""
        self._t()
        return self

    # ------------------------------------------------------ derived scalars
    @property
    def age_today_gyr(self):
        return self._t().age_today_gyr

    @property
    def particle_horizon_mpc(self):
        """Comoving distance light has travelled since the big bang (today)."""
        return self._t().particle_horizon_mpc

    @property
    def event_horizon_mpc(self):
        """Comoving event horizon today; math.inf when the model has none."""
        return self._t().event_horizon_mpc

    @property
    def future_visibility_limit_mpc(self):
        """Farthest comoving distance from which light will ever reach us (math.inf if none)."""
        return self._t().future_visibility_limit_mpc

    @property
    def z_max_tabulated(self):
        return self._t().z_max

    def derived(self):
        """JSON-serialisable derived constants (None where a quantity is infinite/absent)."""
        t = self._t()
        fin = lambda v: None if not math.isfinite(v) else float(v)  # noqa: E731
        return {
            "omega_k": self.omega_k,
            "omega_de": self.omega_de,
            "omega_radiation": self.omega_radiation,
            "omega_nu": self.omega_nu,
            "omega_gamma": self.omega_gamma,
            "hubble_distance_mpc": self.hubble_distance_mpc,
            "hubble_time_gyr": self.hubble_time_gyr,
            "age_today_gyr": t.age_today_gyr,
            "event_horizon_mpc": fin(t.event_horizon_mpc),
            "particle_horizon_mpc": t.particle_horizon_mpc,
            "future_visibility_limit_mpc": fin(t.future_visibility_limit_mpc),
            "event_horizon_redshift": t.event_horizon_redshift,
            "hubble_sphere_redshift": t.hubble_sphere_redshift,
            "end_of_time_gyr": fin(t.end_of_time_gyr),
            "z_max_tabulated": t.z_max,
            "interpolation_error_estimate": t.error_estimate,
        }

    # --------------------------------------------------- vectorised quantities
    def expansion_rate(self, z):
        """E(z) = H(z)/H0."""
        return self._t().run(z, "expansion_rate")

    def hubble_parameter_km_s_mpc(self, z):
        return self._t().run(z, "hubble")

    def comoving_distance_mpc(self, z):
        """Line-of-sight comoving distance D_C (Hogg 1999 eq. 15)."""
        return self._t().run(z, "chi")

    def transverse_comoving_distance_mpc(self, z):
        """Transverse comoving distance D_M (Hogg 1999 eq. 16)."""
        return self._t().run(z, "dm")

    def angular_diameter_distance_mpc(self, z):
        """D_A = D_M / (1+z) (Hogg 1999 eq. 18)."""
        return self._t().run(z, "da")

    def luminosity_distance_mpc(self, z):
        """D_L = (1+z) D_M (Hogg 1999 eq. 21)."""
        return self._t().run(z, "dl")

    def distance_modulus_mag(self, z):
        """5 log10(D_L / 10 pc); -inf at z = 0 exactly (D_L = 0), NaN for z < 0."""
        return self._t().run(z, "mu")

    def lookback_time_gyr(self, z):
        return self._t().run(z, "lookback")

    def age_at_emission_gyr(self, z):
        return self._t().run(z, "age")

    def comoving_volume_mpc3(self, z):
        """Full-sky comoving volume within z (Hogg 1999 eq. 29, curvature-aware)."""
        return self._t().run(z, "volume")

    def differential_comoving_volume_mpc3_sr(self, z):
        """dV_C / dz / dOmega = D_H D_M^2 / E(z) (Hogg 1999 eq. 28)."""
        return self._t().run(z, "dvolume")

    def recession_velocity_now_c(self, z):
        """H0 times the proper distance now, in units of c (= D_C H0 / c)."""
        return self._t().run(z, "v_now")

    def recession_velocity_at_emission_c(self, z):
        """H(z) times the proper distance at emission, in units of c."""
        return self._t().run(z, "v_emit")

    def dcomoving_distance_dz_mpc(self, z):
        """d D_C / dz = c / H(z), Mpc."""
        return self._t().run(z, "dchi_dz")

    def dtransverse_comoving_distance_dz_mpc(self, z):
        """d D_M / dz, Mpc."""
        return self._t().run(z, "ddm_dz")

    def dlookback_time_dz_gyr(self, z):
        """d t_lookback / dz = 1 / ((1+z) H(z)), Gyr."""
        return self._t().run(z, "dt_dz")

    def reachable(self, z):
        """True where D_C(z) is inside today's event horizon (a signal sent now arrives).

        True for every valid z in a model without an event horizon; False for NaN,
        infinite or negative z.
        """
        z = np.asarray(z, dtype=np.float64)
        zeh = self._t().z_eh_or_inf
        with np.errstate(invalid="ignore"):
            out = (z >= 0.0) & (z < zeh) if math.isfinite(zeh) else (z >= 0.0) & (z < math.inf)
        return out[()] if out.ndim == 0 else out

    def horizon_crossing_age_gyr(self, z):
        """Cosmic age at which the object's worldline crosses our event horizon.

        In the past for z > z_EH, in the future for z < z_EH.  NaN without an event
        horizon or for bad z; at z = 0 the end of time (inf unless there is a big rip).
        """
        return self._t().run(z, "cross")

    def signal_arrival_age_gyr(self, z):
        """Cosmic age at which a light signal sent from us today reaches the object.

        NaN where the object is unreachable (beyond the event horizon) or z is bad.
        """
        return self._t().run(z, "arrive")

    def redshift_at_comoving_distance(self, d_mpc):
        """Inverse of comoving_distance_mpc; NaN for d < 0 or beyond the tables."""
        return self._t().run(d_mpc, "inv_chi")

    def redshift_at_lookback_time(self, t_gyr):
        """Inverse of lookback_time_gyr; NaN for t < 0 or t >= age today."""
        return self._t().run(t_gyr, "inv_lookback")

    def redshift_at_age(self, t_gyr):
        """Inverse of age_at_emission_gyr; NaN for t <= 0 or t > age today."""
        return self._t().run(t_gyr, "inv_age")


class _ScaledTables:
    """The tables of one cosmology, in Mpc / Gyr, and the chunked evaluation kernels."""

    def __init__(self, cosmo):
        for refine in range(MAX_REFINE + 1):
            tb = Tables(cosmo._bg, refine=refine)
            err, parts = tb.error_estimate()
            if err <= ERROR_BUDGET:
                break
        else:
            # The loop used to fall through here and keep the last (out-of-budget) tables.
            _refuse_untabulable(cosmo, err, parts)
        self.raw = tb
        self.refine = refine
        self.error_estimate = err
        dh = cosmo.hubble_distance_mpc
        th = cosmo.hubble_time_gyr
        self.dh, self.th = dh, th
        self.z_max = tb.z_max
        self.age_today_gyr = tb.t0 * th
        self.particle_horizon_mpc = tb.eta0 * dh
        self.event_horizon_mpc = tb.R0 * dh
        self.future_visibility_limit_mpc = tb.eta_inf * dh
        self.end_of_time_gyr = tb.t_end * th
        if tb.has_eh:
            self.event_horizon_redshift = tb.redshift_where_chi(tb.R0)
        else:
            self.event_horizon_redshift = None
        self.z_eh_or_inf = (math.inf if self.event_horizon_redshift is None
                            else self.event_horizon_redshift)
        self.hubble_sphere_redshift = tb.redshift_where_chi(1.0)
        T = tb.T
        self.k = {}
        kk = self.k
        kk["expansion_rate"] = (T["ln_e"], _exp)
        kk["hubble"] = (T["ln_e"].scaled(1.0, math.log(cosmo.h0)), _exp)
        kk["chi"] = (T["chi/u"].scaled(dh), _times_u)
        kk["v_now"] = (T["chi/u"], _times_u)
        kk["dm"] = (T["dm/u"].scaled(dh), _times_u)
        kk["da"] = (T["da/u"].scaled(dh), _times_u)
        kk["dl"] = (T["dl/u"].scaled(dh), _times_u)
        # mu = 5 log10(D_L / 10 pc): table of D_L in units of 10 pc.
        kk["mu"] = (T["dl/u"].scaled(dh / k.TEN_PC_IN_MPC), _mu)
        kk["lookback"] = (T["lookback/u"].scaled(th), _times_u)
        kk["age"] = (T["ln_age"].scaled(1.0, math.log(th)), _exp)
        kk["volume"] = (T["vol_root/u"].scaled(dh * (4.0 * math.pi / 3.0) ** (1.0 / 3.0)),
                        _cube)
        kk["dvolume"] = (T["dvol_root/u"].scaled(dh**1.5), _square)
        kk["v_emit"] = (T["v_emit/u"], _times_u)
        kk["dchi_dz"] = (T["ln_dchi_dz"].scaled(1.0, math.log(dh)), _exp)
        kk["ddm_dz"] = (T["ddm_dz"].scaled(dh), None)
        kk["dt_dz"] = (T["ln_dt_dz"].scaled(1.0, math.log(th)), _exp)
        self.chi_dimless = T["chi/u"]
        self.inv_chi = tb.T_inv_chi
        self.inv_t = tb.T_inv_t
        # ln(age) in ln Gyr as a function of tau = ln(elapsed / remaining conformal time).
        self.cross = (tb.T_cross.scaled(1.0, math.log(th)) if tb.T_cross is not None
                      else None)
        self.arrive_eta = tb.T_arrive_eta.scaled(th) if tb.T_arrive_eta is not None else None
        self.R0 = tb.R0
        self.eta0 = tb.eta0
        self.eta_inf = tb.eta_inf
        self.cross_at_zero = tb.t_end * th
        self.r_invalid = -0.5 / tb.eta0
        self.k_inv_t = tb.k_inv_t
        self.r_invalid_t = -0.5 / tb.k_inv_t

    # Each kernel maps a chunk of input to a chunk of output using scratch buffers.
    def run(self, x, what):
        a = np.asarray(x, dtype=np.float64)
        shape = a.shape
        flat = a.reshape(-1)
        n = flat.size
        out = np.empty(n)
        if n:
            m = min(n, _CHUNK)
            v = np.empty(m)
            w = np.empty(m)
            idx = np.empty(m, dtype=np.intp)
            cbuf = np.empty((m, 4))
            kern = self._kernel(what)
            with np.errstate(all="ignore"):
                for s in range(0, n, _CHUNK):
                    e = min(s + _CHUNK, n)
                    c = e - s
                    if c == m:
                        kern(flat[s:e], out[s:e], v, w, idx, cbuf)
                    else:
                        kern(flat[s:e], out[s:e], v[:c], w[:c], idx[:c], cbuf[:c])
        out = out.reshape(shape)
        return out[()] if out.ndim == 0 else out

    # Every kernel first folds invalid input (NaN, negative sentinels such as -99) into a
    # finite value that lands outside the table: numpy's log takes a slow path on NaN,
    # zero, negative or infinite arguments, and catalogues are full of such entries.
    def _kernel(self, what):
        if what in self.k:
            tab, post = self.k[what]
            if post is None:
                def kern(zc, oc, v, w, idx, cbuf):
                    np.fmax(zc, -0.5, out=v)  # NaN, z < 0 -> -0.5 -> below the table
                    np.log1p(v, out=v)
                    tab.eval_into(v, oc, idx, cbuf)
            else:
                def kern(zc, oc, v, w, idx, cbuf):
                    np.fmax(zc, -0.5, out=v)
                    np.log1p(v, out=v)
                    np.copyto(w, v)
                    tab.eval_into(v, oc, idx, cbuf)
                    post(oc, v, w)
            return kern
        return getattr(self, "_k_" + what)

    def _chi(self, zc, oc, v, w, idx, cbuf):
        """oc = D_C(z) in units of c/H0."""
        np.fmax(zc, -0.5, out=v)
        np.log1p(v, out=v)
        np.copyto(w, v)
        self.chi_dimless.eval_into(v, oc, idx, cbuf)
        np.multiply(oc, w, out=oc)

    def _k_cross(self, zc, oc, v, w, idx, cbuf):
        if self.cross is None:
            oc.fill(np.nan)
            return
        self._chi(zc, oc, v, w, idx, cbuf)
        # tau = ln((eta_inf - chi) / chi); NaN -> 1e-300 -> below the table
        np.subtract(self.eta_inf, oc, out=v)
        np.divide(v, oc, out=v)
        np.fmax(v, 1e-300, out=v)
        np.log(v, out=v)
        self.cross.eval_into(v, oc, idx, cbuf)
        np.exp(oc, out=oc)
        np.copyto(oc, self.cross_at_zero, where=(zc == 0.0))

    def _k_arrive(self, zc, oc, v, w, idx, cbuf):
        self._chi(zc, oc, v, w, idx, cbuf)
        if self.cross is not None:
            # tau = ln((eta0 + chi) / (R0 - chi)); beyond the horizon the ratio is
            # negative -> 1e-300 -> below the table -> NaN
            np.subtract(self.R0, oc, out=w)
            np.add(oc, self.eta0, out=v)
            np.divide(v, w, out=v)
            np.fmax(v, 1e-300, out=v)
            np.log(v, out=v)
            self.cross.eval_into(v, oc, idx, cbuf)
            np.exp(oc, out=oc)
        else:
            np.copyto(v, oc)
            self.arrive_eta.eval_into(v, oc, idx, cbuf)

    def _k_inv_chi(self, dc, oc, v, w, idx, cbuf):
        # y = ln(1 + eta0 r), r = d / (eta0 - d); invalid d (NaN, d > eta0) -> r = -0.5/eta0
        # -> y < 0 -> below the table; d < 0 -> y < 0 as well.
        np.subtract(self.particle_horizon_mpc, dc, out=v)
        np.divide(dc, v, out=v)
        np.fmax(v, self.r_invalid, out=v)
        np.multiply(v, self.eta0, out=v)
        np.log1p(v, out=v)
        np.copyto(w, v)
        self.inv_chi.eval_into(v, oc, idx, cbuf)
        np.multiply(oc, w, out=oc)  # table holds u / y
        np.expm1(oc, out=oc)

    def _k_inv_lookback(self, tc, oc, v, w, idx, cbuf):
        # w = ln(1 + k r), r = t_L / (t0 - t_L); invalid t_L -> r = -0.5/k -> below the table
        np.subtract(self.age_today_gyr, tc, out=v)
        np.divide(tc, v, out=v)
        self._inv_t_tail(v, oc, w, idx, cbuf)

    def _k_inv_age(self, tc, oc, v, w, idx, cbuf):
        # r = t_L / t_e = t0 / t - 1 (exactly 0 at t = t0)
        np.divide(self.age_today_gyr, tc, out=v)
        np.subtract(v, 1.0, out=v)
        self._inv_t_tail(v, oc, w, idx, cbuf)

    def _inv_t_tail(self, v, oc, w, idx, cbuf):
        np.fmax(v, self.r_invalid_t, out=v)
        np.multiply(v, self.k_inv_t, out=v)
        np.log1p(v, out=v)
        np.copyto(w, v)
        self.inv_t.eval_into(v, oc, idx, cbuf)
        np.multiply(oc, w, out=oc)  # table holds u / w
        np.expm1(oc, out=oc)


def _refuse_untabulable(cosmo, err, parts):
    """One-line refusal of a model whose tables stay above the error budget."""
    x = np.linspace(-U_MAX, 0.0, 200001)
    with np.errstate(all="ignore"):
        e2 = np.exp(cosmo._bg.ln_e2(x))
    j = int(np.nanargmin(e2))
    worst = max(parts, key=parts.get)
    params = ", ".join(f"{p}={v!r}" for p, v in cosmo.to_dict().items()
                       if p != "name" and v is not None and v != [])
    why = "expansion nearly stalls" if e2[j] < 1e-2 else "expansion rate varies too sharply"
    raise CosmologyError(
        f"this model's {why} (E(z)^2 falls to {e2[j]:.3g} at "
        f"z = {math.expm1(-x[j]):.4g}), so its tables cannot be interpolated within the "
        f"error budget: measured relative error {err:.2g} ({worst}) after {MAX_REFINE} "
        f"refinements, budget {ERROR_BUDGET:g}; refused rather than returning wrong "
        f"numbers ({params})")


def _exp(o, v, u):
    np.exp(o, out=o)


def _times_u(o, v, u):
    np.multiply(o, u, out=o)


def _cube(o, v, u):
    np.multiply(o, u, out=o)
    np.multiply(o, o, out=v)
    np.multiply(o, v, out=o)


def _square(o, v, u):
    np.multiply(o, u, out=o)
    np.multiply(o, o, out=o)


def _mu(o, v, u):
    np.multiply(o, u, out=o)
    np.log10(o, out=o)
    np.multiply(o, 5.0, out=o)
