"""What a flux-limited redshift survey sees: its selection, and the sample it gives.

A :class:`Selection` holds everything that decides whether a galaxy of a given luminosity (or
stellar mass) at a given redshift enters the sample: apparent magnitude limits, a redshift
range, the solid angle, the cosmology, the K-correction and the evolution model. Its
:meth:`Selection.select` turns catalogue columns into a :class:`Sample`, counting every source
it leaves out and why.

The variable ``x``
------------------
Luminosity functions use the evolution-corrected absolute magnitude x = M + Q z, the magnitude
the galaxy would have at z = 0 under M*(z) = M*(0) - Q z (Lin et al. 1999, ApJ 518, 533, eq. 5),
so one Schechter form in x describes every redshift. Mass functions use x = log10 of the stellar
mass [Msun]; Q does not apply to them.

Which x a survey sees at redshift z
-----------------------------------
With D(z) = DM(z) + K(z) (``m = M + DM + K``) a galaxy of luminosity x is seen at z when
``b1 <= s x + g(z) <= b2``: for luminosities s = 1, g(z) = D(z) - Q z and [b1, b2] the apparent
limits; for masses s = -2.5, g(z) = D(z) and, with c = log10 M + 0.4 M_abs (log10 of the
mass-to-light ratio plus a constant of the band), [b1, b2] = [m_bright - 2.5 c_low,
m_faint - 2.5 c_high]. That is the mass-completeness limit per redshift, stated: *the mass a
galaxy at the apparent limit would have if its mass-to-light ratio were the ``mass_limit_
quantile`` (default 95th) percentile of the sample's* (the same at the bright limit with the
low percentile), in the spirit of Pozzetti et al. 2010, A&A 523, A13 (reference from memory).
Galaxies below that limit at their own redshift are left out and counted.

How the numbers are computed
----------------------------
DM(z) and the comoving volume element come from astropy on 2049 redshifts uniform in ln z
across the range; DM is a cubic spline in ln z between them (error < 1e-8 mag), K(z) is the
user's function evaluated exactly. V_max of each galaxy inverts g(z) by interpolation on the
same grid (relative error in V_max < 1e-5).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import interpolate

from countscale import cosmology as _cosmology
from countscale._checks import finite_scalar as _finite_scalar
from countscale._checks import real_array as _real_array
from countscale.errors import InputError, InputTypeError
from countscale.lumfunc.schechter import Evolution

__all__ = ["QUANTITIES", "Sample", "Selection"]

QUANTITIES = ("luminosity", "stellar_mass")

#: Redshift nodes of the distance and volume tables (uniform in ln z).
N_NODES = 2049
#: Lowest redshift of the tables when the range starts at 0 (distances diverge at z = 0);
#: galaxies closer than this are peculiar-velocity dominated (common figure, no source).
Z_FLOOR = 1e-5
#: Width of the apparent-magnitude bins in which the fraction of sources with a redshift is
#: measured, when some lack one (choice of this project).
SAMPLING_BIN_MAG = 0.25
#: A selection needs at least this many galaxies (DESIGN: fewer than 20 is a warning in
#: general; no luminosity function can be fitted to fewer).
MIN_SOURCES = 20


def _resolve_cosmology(cosmo: Any) -> Any:
    from astropy.cosmology import FLRW

    if cosmo is None or isinstance(cosmo, str):
        return _cosmology.get_cosmology(cosmo)
    if isinstance(cosmo, FLRW):
        return cosmo
    raise InputTypeError(
        f"`cosmo` must be an astropy FLRW cosmology, a realization name or None; got "
        f"{type(cosmo).__name__}"
    )


def _pair(name: str, value: Any, rule: str) -> tuple[float, float]:
    if isinstance(value, str | bytes) or not hasattr(value, "__len__") or len(value) != 2:
        raise InputTypeError(f"`{name}` must be a pair {rule}; got {value!r}")
    lo, hi = (_finite_scalar(name, v) for v in value)
    if not lo < hi:
        raise InputError(f"`{name}` must be a pair {rule} with the first < the second; got "
                         f"[{lo!r}, {hi!r}]")
    return lo, hi


@dataclass(frozen=True, eq=False)
class Selection:
    """The selection of a flux-limited redshift survey.

    Parameters
    ----------
    mag_limits : (float, float)
        Apparent magnitude limits [bright, faint] (AB), bright < faint.
    redshift_range : (float, float)
        0 <= z_lo < z_hi.
    area_sr : float
        Solid angle [sr] in (0, 4 pi] (the footprint's measured area, not a flat-sky guess).
    cosmo : astropy FLRW, str or None
        Default Planck 2018 (Planck Collaboration 2020, A&A 641, A6).
    kcorrection : see :func:`countscale.cosmology.as_kcorrection`
        K(z) with m = M + DM + K; must be defined over the whole redshift range.
    evolution : Evolution
        Lin et al. 1999 luminosity (Q) and density (P) evolution; default none.

    Examples
    --------
    >>> sel = Selection((12.0, 19.8), (0.01, 0.3), area_sr=0.012)
    >>> round(float(sel.distance_term(0.1)), 3)   # DM + K at z = 0.1 (Planck18, K = 0)
    38.387
    """

    mag_limits: tuple[float, float]
    redshift_range: tuple[float, float]
    area_sr: float
    cosmo: Any = None
    kcorrection: Any = None
    evolution: Evolution = field(default_factory=Evolution)

    def __post_init__(self) -> None:
        limits = _pair("mag_limits", self.mag_limits, "of apparent magnitudes [bright, faint]")
        z_lo, z_hi = _pair("redshift_range", self.redshift_range, "of redshifts [lo, hi]")
        if z_lo < 0:
            raise InputError(f"`redshift_range` must start at z >= 0; got [{z_lo!r}, {z_hi!r}]")
        area = _finite_scalar("area_sr", self.area_sr)
        if not 0 < area <= 4 * math.pi * (1 + 1e-12):
            raise InputError(f"`area_sr` must be in (0, 4 pi] sr; got {area!r}")
        if not isinstance(self.evolution, Evolution):
            raise InputTypeError(
                f"`evolution` must be a countscale.lumfunc.Evolution; got "
                f"{type(self.evolution).__name__}"
            )
        cosmo = _resolve_cosmology(self.cosmo)
        kfunc = _cosmology.as_kcorrection(self.kcorrection)
        object.__setattr__(self, "mag_limits", limits)
        object.__setattr__(self, "redshift_range", (z_lo, z_hi))
        object.__setattr__(self, "area_sr", area)
        object.__setattr__(self, "cosmo", cosmo)
        object.__setattr__(self, "kcorrection", kfunc)

        ln_z = np.linspace(math.log(max(z_lo, Z_FLOOR)), math.log(z_hi), N_NODES)
        z = np.exp(ln_z)
        z[0], z[-1] = max(z_lo, Z_FLOOR), z_hi
        try:
            k_nodes = np.asarray(kfunc(z), dtype=float)
        except InputError as exc:
            raise InputError(
                f"`kcorrection` must be defined over the redshift range [{z_lo!r}, {z_hi!r}]: "
                f"{exc}"
            ) from None
        dm = np.asarray(cosmo.distmod(z).value, dtype=float)
        volume = np.asarray(cosmo.differential_comoving_volume(z).value, dtype=float)
        object.__setattr__(self, "_ln_z", ln_z)
        object.__setattr__(self, "_z", z)
        object.__setattr__(self, "_dm_spline", interpolate.CubicSpline(ln_z, dm))
        object.__setattr__(self, "_k_nodes", k_nodes)
        object.__setattr__(self, "_d_nodes", dm + k_nodes)
        # dV/dln z = z dV/dz, per sr; times the solid angle.
        object.__setattr__(self, "_dv_dlnz", volume * z * area)
        object.__setattr__(self, "_volume_cache", {})

    # ---- distances -----------------------------------------------------------------------
    def distance_term(self, z: Any) -> np.ndarray:
        """D(z) = DM(z) + K(z) [mag] for redshifts inside the range (m = M + D)."""
        zz = np.asarray(z, dtype=float)
        return self._dm_spline(np.log(zz)) + np.asarray(self.kcorrection(zz), dtype=float)

    @property
    def z_nodes(self) -> np.ndarray:
        """The redshift grid of the tables (read-only view)."""
        view = self._z.view()
        view.flags.writeable = False
        return view

    @property
    def d_nodes(self) -> np.ndarray:
        """D(z) on :attr:`z_nodes`."""
        view = self._d_nodes.view()
        view.flags.writeable = False
        return view

    # ---- volumes -------------------------------------------------------------------------
    def _cumulative_volume(self, P: float) -> Any:
        """Antiderivative in ln z of (solid angle) dV/dln z 10^(0.4 P z), from the range's start."""
        key = float(P)
        cache = self._volume_cache
        if key not in cache:
            if len(cache) > 32:
                cache.clear()
            weight = self._dv_dlnz * 10.0 ** (0.4 * key * self._z)
            cache[key] = interpolate.CubicSpline(self._ln_z, weight).antiderivative()
        return cache[key]

    def volume_weight_nodes(self, P: float | None = None) -> np.ndarray:
        """(solid angle) dV/dln z 10^(0.4 P z) at the nodes [Mpc^3]; P default the selection's."""
        P = self.evolution.P if P is None else P
        return self._dv_dlnz * 10.0 ** (0.4 * P * self._z)

    def volume_between(self, z1: Any, z2: Any, P: float | None = None) -> np.ndarray:
        """Density-weighted comoving volume between z1 and z2 inside the solid angle [Mpc^3].

        The integral of dV 10^(0.4 P z) (Lin et al. 1999 density evolution, so that a constant
        phi*(0) over this volume gives the expected number); z1, z2 inside the range.
        """
        P = self.evolution.P if P is None else P
        spline = self._cumulative_volume(P)
        lo = np.log(np.maximum(np.asarray(z1, dtype=float), self._z[0]))
        hi = np.log(np.maximum(np.asarray(z2, dtype=float), self._z[0]))
        return spline(hi) - spline(lo)

    @property
    def volume_mpc3(self) -> float:
        """Comoving volume of the whole redshift range inside the solid angle [Mpc^3]."""
        return float(self.volume_between(self._z[0], self._z[-1], P=0.0))

    def describe(self) -> dict[str, Any]:
        """JSON-ready summary of the selection."""
        return {
            "mag_limits": list(self.mag_limits),
            "redshift_range": list(self.redshift_range),
            "area_sr": self.area_sr,
            "volume_mpc3": self.volume_mpc3,
            "cosmology": str(self.cosmo.name) if self.cosmo.name else repr(self.cosmo),
            "H0": float(self.cosmo.H0.value),
            "evolution": {"Q": self.evolution.Q, "P": self.evolution.P},
        }

    # ---- samples -------------------------------------------------------------------------
    def select(self, mag: Any, z: Any, *, weight: Any = None, region: Any = None,
               region_area_sr: Any = None, log10_mass: Any = None,
               redshift_error: Any = None, mass_limit_quantile: float = 0.95) -> Sample:
        """The sample this selection makes of catalogue columns, with every cut counted.

        Parameters
        ----------
        mag : array_like, shape (n,)
            Apparent magnitudes (AB) of the sources in the footprint.
        z : array_like, shape (n,)
            Redshifts (NaN: none measured).
        weight : array_like, shape (n,), optional
            Per-source weights >= 1 (1 / completeness); default 1.
        region : array_like of int, shape (n,), optional
            Jackknife region of each source (0 .. n_regions - 1), with `region_area_sr`.
        region_area_sr : array_like, shape (n_regions,), optional
            Solid angle of each region [sr].
        log10_mass : array_like, shape (n,), optional
            log10 stellar mass [Msun]: makes a stellar-mass sample (Q must be 0).
        redshift_error : array_like, shape (n,), optional
            1-sigma redshift errors (photometric redshifts); >= 0.
        mass_limit_quantile : float
            Percentile (as a fraction in [0.5, 1)) of the sample's mass-to-light ratio that
            sets the mass-completeness limit (see the module notes).

        Returns
        -------
        Sample

        Notes
        -----
        Precedence of the cuts (each source is counted once, in the first that applies):
        outside the apparent limits; no finite redshift; redshift outside the range; no
        finite stellar mass (mass samples); below or above the mass limit at its redshift.
        When sources inside the apparent limits lack a redshift, the others are weighted by
        the inverse of the fraction with a redshift in their 0.25-mag bin of apparent
        magnitude: missing redshifts are taken to be missing at random at fixed magnitude.
        """
        return Sample._build(self, mag, z, weight, region, region_area_sr, log10_mass,
                             redshift_error, mass_limit_quantile)


def _column(name: str, value: Any, n: int | None) -> np.ndarray:
    arr = _real_array(name, value)
    if arr.ndim != 1 or (n is not None and arr.size != n):
        want = "1-d" if n is None else f"1-d with {n} values (one per source)"
        raise InputError(f"`{name}` must be {want}; got shape {arr.shape}")
    return arr


@dataclass(frozen=True, eq=False)
class Sample:
    """Galaxies inside a :class:`Selection`: what the estimators fit.

    Built by :meth:`Selection.select`. Arrays are read-only, one value per galaxy kept.

    Attributes
    ----------
    selection : Selection
    quantity : {"luminosity", "stellar_mass"}
    value : ndarray
        Absolute magnitude M at the galaxy's redshift (luminosity) or log10 mass (mass).
    z : ndarray
    weight : ndarray
        Completeness and redshift-sampling weights (1 when there are none).
    region : ndarray of int or None
    region_area_sr : ndarray or None
    redshift_error : ndarray or None
    counts : dict
        ``n_input``, ``n_outside_mag_limits``, ``n_no_redshift``,
        ``n_outside_redshift_range``, ``n_no_stellar_mass``, ``n_outside_mass_limits``,
        ``n_used`` (they add up: ``n_input`` = the rest).
    mass_limit : dict or None
        For mass samples: ``c_low``, ``c_high`` (log10 M + 0.4 M_abs percentiles) and the
        quantile; the limits in x follow from them.
    redshift_sampling : dict or None
        When some sources lacked a redshift: the correction applied.
    """

    selection: Selection
    quantity: str
    value: np.ndarray
    z: np.ndarray
    weight: np.ndarray
    region: np.ndarray | None
    region_area_sr: np.ndarray | None
    redshift_error: np.ndarray | None
    counts: dict
    mass_limit: dict | None
    redshift_sampling: dict | None

    # ---- construction --------------------------------------------------------------------
    @classmethod
    def _build(cls, sel: Selection, mag: Any, z: Any, weight: Any, region: Any,
               region_area_sr: Any, log10_mass: Any, redshift_error: Any,
               quantile: Any) -> Sample:
        m = _column("mag", mag, None)
        n = m.size
        zz = _column("z", z, n)
        w = np.ones(n) if weight is None else _column("weight", weight, n)
        bad = ~np.isfinite(w) | (w <= 0)
        if bad.any():
            i = int(np.argmax(bad))
            raise InputError(f"`weight` must be finite and > 0; got {float(w[i])!r} (at index "
                             f"{i})")
        mass = None if log10_mass is None else _column("log10_mass", log10_mass, n)
        z_err = None if redshift_error is None else _column("redshift_error", redshift_error, n)
        if z_err is not None:
            bad = ~(z_err >= 0) & np.isfinite(zz)
            if bad.any():
                i = int(np.argmax(bad))
                raise InputError(
                    f"`redshift_error` must be >= 0 where a redshift is given; got "
                    f"{float(z_err[i])!r} (at index {i})"
                )
        regions = areas = None
        if region is not None:
            if region_area_sr is None:
                raise InputError("`region` needs `region_area_sr` (the solid angle of each "
                                 "region)")
            areas = _column("region_area_sr", region_area_sr, None)
            if not (np.isfinite(areas).all() and (areas >= 0).all()):
                raise InputError(f"`region_area_sr` must be finite and >= 0; got {areas!r:.80}")
            raw = np.asarray(region)
            if raw.shape != (n,) or raw.dtype.kind not in "iu":
                raise InputError(
                    f"`region` must be {n} integer region numbers; got shape {raw.shape}, "
                    f"dtype {raw.dtype}"
                )
            if n and (raw.min() < 0 or raw.max() >= areas.size):
                raise InputError(
                    f"`region` must be in [0, {areas.size - 1}] (one per `region_area_sr`); "
                    f"got {int(raw.min())}..{int(raw.max())}"
                )
            regions = raw.astype(np.int64)
        q = _finite_scalar("mass_limit_quantile", quantile)
        if not 0.5 <= q < 1.0:
            raise InputError(f"`mass_limit_quantile` must be in [0.5, 1); got {q!r}")
        is_mass = mass is not None
        if is_mass and sel.evolution.Q != 0:
            raise InputError(
                f"evolution `Q` = {sel.evolution.Q!r} applies to luminosity functions; a "
                "stellar-mass function takes Q = 0"
            )

        counts = {"n_input": n}
        bright, faint = sel.mag_limits
        finite_m = np.isfinite(m)
        in_mag = finite_m & (m >= bright) & (m <= faint)
        counts["n_outside_mag_limits"] = int(n - in_mag.sum())
        has_z = in_mag & np.isfinite(zz)
        counts["n_no_redshift"] = int(in_mag.sum() - has_z.sum())
        z_lo, z_hi = sel.redshift_range
        in_z = has_z & (zz >= z_lo) & (zz <= z_hi) & (zz > 0)
        counts["n_outside_redshift_range"] = int(has_z.sum() - in_z.sum())

        sampling = None
        w = w.copy()
        if counts["n_no_redshift"]:
            w, sampling = _redshift_sampling_weights(m, in_mag, has_z, w, bright)

        keep = in_z
        mass_limit = None
        if is_mass:
            has_mass = keep & np.isfinite(mass)
            counts["n_no_stellar_mass"] = int(keep.sum() - has_mass.sum())
            keep = has_mass
        else:
            counts["n_no_stellar_mass"] = 0
        counts["n_outside_mass_limits"] = 0
        if not keep.any():
            raise InputError(_empty_message(sel, counts))

        d = sel.distance_term(zz[keep])
        abs_mag = m[keep] - d
        if is_mass:
            c = mass[keep] + 0.4 * abs_mag
            c_high = float(np.quantile(c, q))
            c_low = float(np.quantile(c, 1.0 - q))
            mass_limit = {"quantile": q, "c_low": c_low, "c_high": c_high}
            b1, b2 = bright - 2.5 * c_low, faint - 2.5 * c_high
            s_x = -2.5 * mass[keep] + d
            inside = (s_x >= b1) & (s_x <= b2)
            counts["n_outside_mass_limits"] = int((~inside).sum())
            idx = np.flatnonzero(keep)[inside]
            keep = np.zeros(n, dtype=bool)
            keep[idx] = True
            value = mass[idx]
        else:
            value = abs_mag
        counts["n_used"] = int(keep.sum())
        if counts["n_used"] < MIN_SOURCES:
            raise InputError(
                f"a luminosity function needs at least {MIN_SOURCES} galaxies inside the "
                f"selection; got {counts['n_used']} ({_count_text(counts)})"
            )

        def frozen(values: np.ndarray | None) -> np.ndarray | None:
            if values is None:
                return None
            out = np.ascontiguousarray(values, dtype=values.dtype)
            out.flags.writeable = False
            return out

        return cls(
            selection=sel,
            quantity="stellar_mass" if is_mass else "luminosity",
            value=frozen(np.asarray(value, dtype=float)),
            z=frozen(zz[keep]),
            weight=frozen(w[keep]),
            region=frozen(None if regions is None else regions[keep]),
            region_area_sr=frozen(areas),
            redshift_error=frozen(None if z_err is None else z_err[keep]),
            counts=counts,
            mass_limit=mass_limit,
            redshift_sampling=sampling,
        )

    # ---- the variable x and its limits ---------------------------------------------------
    @property
    def n(self) -> int:
        return int(self.z.size)

    @property
    def x_unit(self) -> str:
        return "mag" if self.quantity == "luminosity" else "dex"

    @property
    def x_name(self) -> str:
        """Name of x in results: ``"mag"`` or ``"log10_mass"``."""
        return "mag" if self.quantity == "luminosity" else "log10_mass"

    def x(self, Q: float | None = None) -> np.ndarray:
        """Each galaxy's x: M + Q z (luminosity) or log10 mass."""
        if self.quantity != "luminosity":
            return self.value
        Q = self.selection.evolution.Q if Q is None else Q
        return self.value + Q * self.z if Q else self.value

    def _visibility(self, Q: float | None) -> tuple[float, float, float]:
        """(s, b1, b2) of the rule b1 <= s x + g(z) <= b2."""
        bright, faint = self.selection.mag_limits
        if self.quantity == "luminosity":
            return 1.0, bright, faint
        ml = self.mass_limit
        return -2.5, bright - 2.5 * ml["c_low"], faint - 2.5 * ml["c_high"]

    def g(self, z: Any, Q: float | None = None) -> np.ndarray:
        """g(z) = D(z) - Q z (luminosity) or D(z) (mass)."""
        d = self.selection.distance_term(z)
        if self.quantity == "luminosity":
            Q = self.selection.evolution.Q if Q is None else Q
            return d - Q * np.asarray(z, dtype=float)
        return d

    def g_nodes(self, Q: float | None = None) -> np.ndarray:
        sel = self.selection
        if self.quantity == "luminosity":
            Q = sel.evolution.Q if Q is None else Q
            return sel._d_nodes - Q * sel._z
        return sel._d_nodes

    def limits_from_g(self, g: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """The visible range [lo, hi] of x where g(z) = ``g``."""
        s, b1, b2 = self._visibility(None)
        a, b = (b1 - g) / s, (b2 - g) / s
        return (a, b) if s > 0 else (b, a)

    def limits(self, z: Any, Q: float | None = None) -> tuple[np.ndarray, np.ndarray]:
        """The x range [lo, hi] a galaxy at redshift z can have and be in the sample."""
        return self.limits_from_g(self.g(z, Q))

    def x_range(self, Q: float | None = None) -> tuple[float, float]:
        """The x values visible somewhere in the redshift range: [min lo, max hi]."""
        lo, hi = self.limits_from_g(self.g_nodes(Q))
        return float(lo.min()), float(hi.max())

    def redshift_limits(self, Q: float | None = None, x: Any = None
                        ) -> tuple[np.ndarray, np.ndarray]:
        """(z_min, z_max): the redshifts over which each galaxy (or each ``x``) would be seen.

        Requires g(z) to increase with z over the range (distances grow faster than the
        K-correction and evolution can compensate); a K-correction that breaks this is an
        error, as V_max is then not an interval.
        """
        sel = self.selection
        g = self.g_nodes(Q)
        step = np.diff(g)
        if not (step > 0).all():
            i = int(np.argmax(step <= 0))
            raise InputError(
                f"the apparent magnitude of a galaxy must grow with redshift over the range "
                f"(m = M + DM + K - Q z); the K-correction and evolution make it fall at "
                f"z = {sel._z[i]:.4g}"
            )
        s, b1, b2 = self._visibility(Q)
        xx = self.x(Q) if x is None else np.asarray(x, dtype=float)
        ln_lo = np.interp(b1 - s * xx, g, sel._ln_z)
        ln_hi = np.interp(b2 - s * xx, g, sel._ln_z)
        z_min, z_max = np.exp(ln_lo), np.exp(ln_hi)
        z_min[(b1 - s * xx) <= g[0]] = sel._z[0]
        z_max[(b2 - s * xx) >= g[-1]] = sel._z[-1]
        if x is None:
            # Each galaxy is seen at its own redshift: guard against interpolation rounding.
            z_min = np.minimum(z_min, self.z)
            z_max = np.maximum(z_max, self.z)
        return z_min, z_max

    def vmax(self, Q: float | None = None, P: float | None = None) -> np.ndarray:
        """Density-weighted V_max of each galaxy [Mpc^3] (Schmidt 1968, ApJ 151, 393)."""
        z_min, z_max = self.redshift_limits(Q)
        return self.selection.volume_between(z_min, z_max, P)

    # ---- summaries -----------------------------------------------------------------------
    def describe(self) -> dict[str, Any]:
        """JSON-ready summary: counts, weights, mass limits."""
        w = self.weight
        out: dict[str, Any] = {
            "quantity": self.quantity,
            **self.counts,
            "sum_of_weights": float(w.sum()),
            "max_weight": float(w.max()),
            "n_weighted": int((w > 1.0 + 1e-9).sum()),
            "redshift_median": float(np.median(self.z)),
            "photometric_redshifts": self.redshift_error is not None,
        }
        if self.mass_limit is not None:
            lo_z, hi_z = self.selection.redshift_range
            probe = np.linspace(max(lo_z, self.selection._z[0]), hi_z, 7)
            lo, _ = self.limits(probe)
            out["mass_limit"] = {
                **self.mass_limit,
                "assumption": (
                    "a galaxy is counted down to the mass it would have at the faint apparent "
                    f"limit with the {100 * self.mass_limit['quantile']:.0f}th percentile of the "
                    "sample's mass-to-light ratio; galaxies below that mass at their "
                    "redshift are left out"
                ),
                "z": probe.tolist(),
                "log10_mass": [float(v) for v in lo],
            }
        if self.redshift_sampling is not None:
            out["redshift_sampling"] = self.redshift_sampling
        return out


def _count_text(counts: dict) -> str:
    parts = [f"{counts['n_input']} in the footprint"]
    labels = (("n_outside_mag_limits", "outside the apparent limits"),
              ("n_no_redshift", "without a redshift"),
              ("n_outside_redshift_range", "outside the redshift range"),
              ("n_no_stellar_mass", "without a stellar mass"),
              ("n_outside_mass_limits", "outside the mass limits"))
    parts += [f"{counts[k]} {text}" for k, text in labels if counts.get(k)]
    return ", ".join(parts)


def _empty_message(sel: Selection, counts: dict) -> str:
    if counts["n_input"] == 0:
        return "no source to fit: the catalogue has no source in the footprint"
    if counts["n_outside_mag_limits"] == counts["n_input"]:
        return (f"no source lies inside the apparent limits {list(sel.mag_limits)}; got "
                f"{counts['n_input']} sources, all outside")
    if counts["n_no_redshift"] and not counts["n_outside_redshift_range"]:
        return (f"no source inside the apparent limits has a finite redshift ("
                f"{_count_text(counts)})")
    if counts["n_no_stellar_mass"] and not counts["n_outside_redshift_range"]:
        return f"no source in the selection has a finite stellar mass ({_count_text(counts)})"
    return (f"no redshift lies inside `redshift_range` {list(sel.redshift_range)} ("
            f"{_count_text(counts)})")


def _redshift_sampling_weights(m: np.ndarray, in_mag: np.ndarray, has_z: np.ndarray,
                               w: np.ndarray, bright: float) -> tuple[np.ndarray, dict]:
    """Weights / (fraction with a redshift in each 0.25-mag bin of apparent magnitude)."""
    slot = np.floor((m[in_mag] - bright) / SAMPLING_BIN_MAG).astype(np.int64)
    n_all = np.bincount(slot)
    n_z = np.bincount(slot[has_z[in_mag]], minlength=n_all.size)
    with np.errstate(divide="ignore", invalid="ignore"):
        fraction = np.where(n_all > 0, n_z / np.maximum(n_all, 1), 0.0)
    where = np.flatnonzero(has_z)
    s = np.floor((m[where] - bright) / SAMPLING_BIN_MAG).astype(np.int64)
    out = w.copy()
    out[where] = w[where] / fraction[s]
    return out, {
        "n_without_redshift": int((in_mag & ~has_z).sum()),
        "fraction_with_redshift": float(has_z.sum() / in_mag.sum()),
        "bin_mag": SAMPLING_BIN_MAG,
        "min_fraction": float(fraction[n_z > 0].min()) if (n_z > 0).any() else 0.0,
        "assumption": ("sources without a redshift are taken to be missing at random at fixed "
                       "apparent magnitude: the others are weighted by 1 / (fraction with a "
                       f"redshift) in bins of {SAMPLING_BIN_MAG} mag"),
    }
