"""The linear matter power spectrum: Eisenstein & Hu (1998) transfer functions, sigma8, growth.

Topics
------
eisenstein_hu_transfer
    T(k) with baryon acoustic features (EH98 eqs. 2-24) or the smooth "no-wiggle" shape
    (EH98 eqs. 26, 28-31).
sound_horizon_mpc
    The comoving sound horizon at the drag epoch (EH98 eq. 6) and its fit (eq. 26).
growth_factor
    Linear growth D(z) / D(0) from the growth equation in the cosmology's own expansion.
LinearPower, linear_power
    P(k, z) = A k^n_s T(k)^2 D(z)^2 normalised to sigma8; ``sigma_r`` for any radius.

Units: wavenumbers in Mpc^-1 (``k_per_mpc``), lengths in Mpc, P in Mpc^3, all with the
cosmology's own H0 (no factors of h; published values in h units are converted in tests).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import integrate, interpolate

from countscale._checks import check_real
from countscale._checks import real_array as _real_array
from countscale.errors import InputError, InputTypeError

__all__ = [
    "PLANCK18_N_S",
    "PLANCK18_SIGMA8",
    "LinearPower",
    "eisenstein_hu_transfer",
    "growth_factor",
    "linear_power",
    "sound_horizon_mpc",
]

#: sigma8 and the scalar spectral index of Planck 2018 (Planck Collaboration 2020, A&A 641,
#: A6, Table 2, TT,TE,EE+lowE+lensing+BAO), used when a cosmology carries neither.
PLANCK18_SIGMA8 = 0.8102
PLANCK18_N_S = 0.9665

#: CMB temperature today when a cosmology has none (astropy's explicit-parameter default is
#: Tcmb0 = 0, no radiation); the transfer function needs it. Fixsen 2009, ApJ 707, 916.
DEFAULT_TCMB_K = 2.72548

#: sigma8 is defined for a top-hat sphere of radius 8 h^-1 Mpc (common figure, no source).
_SIGMA8_RADIUS_MPC_H = 8.0

#: Integration grid for sigma(R): ln k from 1e-5 to 1e3 Mpc^-1. 6000 points resolve the
#: top-hat window's oscillations (period 2 pi / R in k) for R >= 0.5 Mpc.
_LNK_GRID = np.linspace(math.log(1e-5), math.log(1e3), 6001)

#: Growth is integrated from this scale factor (deep in the radiation era), where the
#: growing mode of matter + radiation is known in closed form (Meszaros effect).
_GROWTH_A_START = 1e-5


# --------------------------------------------------------------------------------------------
# Transfer functions
# --------------------------------------------------------------------------------------------
def _parameters_iv(omega_m_h2, omega_b_h2, tcmb_k):
    omega_m_h2 = check_real(omega_m_h2, "omega_m_h2", 0.0)
    omega_b_h2 = check_real(omega_b_h2, "omega_b_h2", 0.0, low_open=False)
    tcmb_k = check_real(tcmb_k, "tcmb_k", 0.0)
    if omega_b_h2 >= omega_m_h2:
        raise InputError(
            f"`omega_b_h2` must be below `omega_m_h2` ({omega_m_h2:g}); got {omega_b_h2:g}"
        )
    return omega_m_h2, omega_b_h2, tcmb_k


def _k_iv(k_per_mpc):
    k = _real_array("k_per_mpc", k_per_mpc)
    bad = ~np.isfinite(k) | (k <= 0)
    if bad.any():
        raise InputError(
            f"`k_per_mpc` must be finite and > 0; got {float(k[bad].ravel()[0])!r}"
        )
    return k


def sound_horizon_mpc(omega_m_h2, omega_b_h2, tcmb_k=DEFAULT_TCMB_K, fit=False):
    """Comoving sound horizon at the drag epoch [Mpc].

    Parameters
    ----------
    omega_m_h2, omega_b_h2 : float
        Physical matter (CDM + baryons) and baryon densities, Omega h^2.
    tcmb_k : float
        CMB temperature today [K].
    fit : bool
        False: EH98 eq. 6 with the drag redshift of eq. 4. True: the simpler fit of eq. 26,
        ``44.5 ln(9.83 / omega_m) / sqrt(1 + 10 omega_b^(3/4))``, which EH98 quote as good to
        about 2 % for 0.0025 <= omega_b <= 0.25 and 0.025 <= omega_m <= 0.5.

    Notes
    -----
    Eisenstein & Hu 1998, ApJ 496, 605, eqs. 2-6 and 26.
    """
    omega_m_h2, omega_b_h2, tcmb_k = _parameters_iv(omega_m_h2, omega_b_h2, tcmb_k)
    if omega_b_h2 <= 0:
        raise InputError("`omega_b_h2` must be > 0 for a sound horizon; got 0")
    if fit:
        return 44.5 * math.log(9.83 / omega_m_h2) / math.sqrt(1.0 + 10.0 * omega_b_h2**0.75)
    return _EH98(omega_m_h2, omega_b_h2, tcmb_k).s


class _EH98:
    """The scalars of the Eisenstein & Hu (1998) fit for one cosmology (eqs. 2-15)."""

    def __init__(self, om, ob, tcmb_k):
        # om = Omega_m h^2, ob = Omega_b h^2.
        theta = tcmb_k / 2.7
        self.om, self.ob, self.theta = om, ob, theta
        self.f_b = ob / om
        self.f_c = 1.0 - self.f_b
        self.z_eq = 2.50e4 * om * theta**-4  # eq. 2
        self.k_eq = 7.46e-2 * om * theta**-2  # eq. 3, Mpc^-1
        b1 = 0.313 * om**-0.419 * (1.0 + 0.607 * om**0.674)  # eq. 4
        b2 = 0.238 * om**0.223
        self.z_d = 1291.0 * om**0.251 / (1.0 + 0.659 * om**0.828) * (1.0 + b1 * ob**b2)
        if ob > 0:
            r_factor = 31.5 * ob * theta**-4
            r_d = r_factor / (self.z_d / 1e3)  # eq. 5
            r_eq = r_factor / (self.z_eq / 1e3)
            self.s = (2.0 / (3.0 * self.k_eq) * math.sqrt(6.0 / r_eq)  # eq. 6
                      * math.log((math.sqrt(1.0 + r_d) + math.sqrt(r_d + r_eq))
                                 / (1.0 + math.sqrt(r_eq))))
            self.k_silk = (1.6 * ob**0.52 * om**0.73  # eq. 7
                           * (1.0 + (10.4 * om) ** -0.95))
            a1 = (46.9 * om) ** 0.670 * (1.0 + (32.1 * om) ** -0.532)  # eq. 11
            a2 = (12.0 * om) ** 0.424 * (1.0 + (45.0 * om) ** -0.582)
            self.alpha_c = a1**-self.f_b * a2 ** -(self.f_b**3)
            bb1 = 0.944 / (1.0 + (458.0 * om) ** -0.708)  # eq. 12
            bb2 = (0.395 * om) ** -0.0266
            self.beta_c = 1.0 / (1.0 + bb1 * (self.f_c**bb2 - 1.0))
            y = (1.0 + self.z_eq) / (1.0 + self.z_d)  # eq. 15
            root = math.sqrt(1.0 + y)
            g_y = y * (-6.0 * root + (2.0 + 3.0 * y) * math.log((root + 1.0) / (root - 1.0)))
            self.alpha_b = 2.07 * self.k_eq * self.s * (1.0 + r_d) ** -0.75 * g_y  # eq. 14
            self.beta_b = 0.5 + self.f_b + (3.0 - 2.0 * self.f_b) * math.sqrt(  # eq. 24
                (17.2 * om) ** 2 + 1.0)
            self.beta_node = 8.41 * om**0.435  # eq. 23
        else:
            self.s = 0.0

    @staticmethod
    def _t0(k, q, alpha, beta):
        """EH98 eqs. 19-20: the pressureless transfer function with alpha, beta."""
        log_term = np.log(math.e + 1.8 * beta * q)
        c = 14.2 / alpha + 386.0 / (1.0 + 69.9 * q**1.08)
        return log_term / (log_term + c * q * q)

    def transfer(self, k):
        """Full fit with baryon features, k in Mpc^-1 (eqs. 16-24)."""
        if self.ob <= 0:
            return self.no_wiggle(k)
        q = k / (13.41 * self.k_eq)  # eq. 10
        ks = k * self.s
        f = 1.0 / (1.0 + (ks / 5.4) ** 4)  # eq. 18
        t_c = (f * self._t0(k, q, 1.0, self.beta_c)  # eq. 17
               + (1.0 - f) * self._t0(k, q, self.alpha_c, self.beta_c))
        s_tilde = self.s / np.cbrt(1.0 + (self.beta_node / ks) ** 3)  # eq. 22
        x = k * s_tilde
        j0 = np.sinc(x / math.pi)  # sin(x) / x
        t_b = (self._t0(k, q, 1.0, 1.0) / (1.0 + (ks / 5.2) ** 2)  # eq. 21
               + self.alpha_b / (1.0 + (self.beta_b / ks) ** 3)
               * np.exp(-((k / self.k_silk) ** 1.4))) * j0
        return self.f_b * t_b + self.f_c * t_c  # eq. 16

    def no_wiggle(self, k):
        """The smooth shape without acoustic oscillations, k in Mpc^-1 (eqs. 26, 28-31)."""
        om, ob, f_b = self.om, self.ob, self.f_b
        if ob > 0:
            s = 44.5 * math.log(9.83 / om) / math.sqrt(1.0 + 10.0 * ob**0.75)  # eq. 26
            alpha_gamma = (1.0 - 0.328 * math.log(431.0 * om) * f_b  # eq. 31
                           + 0.38 * math.log(22.3 * om) * f_b * f_b)
            # Gamma_eff * h = Omega_m h^2 [alpha + (1 - alpha) / (1 + (0.43 k s)^4)] (eq. 30)
            gamma_h = om * (alpha_gamma + (1.0 - alpha_gamma) / (1.0 + (0.43 * k * s) ** 4))
        else:
            gamma_h = om * np.ones_like(k)
        # q = k [h Mpc^-1] Theta^2 / Gamma_eff = k [Mpc^-1] Theta^2 / (Gamma_eff h)  (eq. 28)
        q = k * self.theta**2 / gamma_h
        l0 = np.log(2.0 * math.e + 1.8 * q)  # eq. 29
        c0 = 14.2 + 731.0 / (1.0 + 62.5 * q)
        return l0 / (l0 + c0 * q * q)


def eisenstein_hu_transfer(k_per_mpc, omega_m_h2, omega_b_h2, tcmb_k=DEFAULT_TCMB_K,
                           wiggles=True):
    """The Eisenstein & Hu (1998) matter transfer function T(k).

    Parameters
    ----------
    k_per_mpc : float or array_like
        Wavenumbers [Mpc^-1], > 0.
    omega_m_h2, omega_b_h2 : float
        Physical densities of matter (CDM + baryons) and of baryons, Omega h^2.
    tcmb_k : float
        CMB temperature today [K].
    wiggles : bool
        True: the full fit with baryon acoustic oscillations (EH98 eq. 16); False: the
        smooth "no-wiggle" shape (eqs. 26-31). With ``omega_b_h2 = 0`` both are the
        zero-baryon shape.

    Returns
    -------
    float or ndarray
        T(k), -> 1 as k -> 0.

    Notes
    -----
    Eisenstein, D. J. & Hu, W. 1998, ApJ 496, 605 (arXiv:astro-ph/9709112): good to better
    than 10 % in the large-scale-structure regime for adiabatic CDM cosmologies (abstract).

    Examples
    --------
    >>> round(float(eisenstein_hu_transfer(0.1 * 0.6766, 0.14175, 0.02242, 2.7255,
    ...                                    wiggles=False)), 4)
    0.1332
    """
    omega_m_h2, omega_b_h2, tcmb_k = _parameters_iv(omega_m_h2, omega_b_h2, tcmb_k)
    if not isinstance(wiggles, bool):
        raise InputTypeError(f"`wiggles` must be True or False; got {wiggles!r}")
    k = _k_iv(k_per_mpc)
    model = _EH98(omega_m_h2, omega_b_h2, tcmb_k)
    out = model.transfer(k) if wiggles else model.no_wiggle(k)
    return float(out) if np.ndim(k) == 0 else out


# --------------------------------------------------------------------------------------------
# Growth
# --------------------------------------------------------------------------------------------
def _resolve_cosmology(cosmo):
    from countscale import cosmology as cosmology_module

    return cosmology_module._resolve(cosmo)


class _Growth:
    """D(a) / D(1) from the linear growth equation, solved once per cosmology."""

    def __init__(self, cosmo):
        ln_a = np.linspace(math.log(_GROWTH_A_START), 0.0, 4001)
        a = np.exp(ln_a)
        e2 = np.asarray(cosmo.efunc(1.0 / a - 1.0), dtype=float) ** 2
        # Clustering matter: CDM + baryons (astropy's Om0; massive neutrinos are apart).
        matter = float(cosmo.Om0) * a**-3
        ln_e = interpolate.CubicSpline(ln_a, 0.5 * np.log(e2))
        dln_e = ln_e.derivative()

        def rhs(x, y):
            e2_x = math.exp(2.0 * float(ln_e(x)))
            omega_m = float(cosmo.Om0) * math.exp(-3.0 * x) / e2_x
            return [y[1], -(2.0 + float(dln_e(x))) * y[1] + 1.5 * omega_m * y[0]]

        # Growing mode of CDM in matter + radiation (Meszaros 1974, A&A 37, 225; the form
        # D = a + 2 a_eq / 3 from memory), with everything that is not matter counted as
        # radiation at the start (Lambda and curvature are negligible at a = 1e-5).
        a0 = a[0]
        a_eq = a0 * max(e2[0] - matter[0], 0.0) / matter[0]
        solution = integrate.solve_ivp(rhs, (ln_a[0], 0.0), [a0 + 2.0 * a_eq / 3.0, a0],
                                       method="DOP853", rtol=1e-10, atol=1e-14,
                                       dense_output=True)
        if not solution.success:  # pragma: no cover - smooth ODE
            raise RuntimeError(f"the growth equation did not integrate: {solution.message}")
        self._solution = solution
        self._d0 = float(solution.sol(0.0)[0])

    def __call__(self, z):
        ln_a = -np.log1p(z)
        return self._solution.sol(np.atleast_1d(ln_a).ravel())[0].reshape(np.shape(z)) / self._d0


def _redshift_iv(z, name="z"):
    z = _real_array(name, z)
    bad = ~np.isfinite(z) | (z < 0) | (z > 1.0 / _GROWTH_A_START - 1.0)
    if bad.any():
        raise InputError(
            f"`{name}` must be finite and in [0, {1.0 / _GROWTH_A_START - 1.0:.0f}]; got "
            f"{float(z[bad].ravel()[0])!r}"
        )
    return z


def growth_factor(z, cosmo=None):
    """Linear growth factor D(z) / D(0) of matter perturbations.

    Parameters
    ----------
    z : float or array_like
        Redshifts, 0 <= z <= 1e5.
    cosmo : astropy FLRW, str or None
        Default Planck18.

    Returns
    -------
    float or ndarray

    Notes
    -----
    Solves D'' + (2 + d ln E / d ln a) D' = (3/2) Omega_m(a) D in ln a (' = d/d ln a), with
    E(a) = H/H0 from astropy (radiation, massive neutrinos, curvature and Lambda included)
    and Omega_m(a) the CDM + baryon density (Peebles 1980, The Large-Scale Structure of the
    Universe, section 10; from memory), from a = 1e-5 with the matter + radiation growing
    mode. For matter + Lambda alone it reproduces Heath's integral (Heath 1977, MNRAS 179,
    351), D proportional to E(a) integral_0^a da' / (a' E(a'))^3; the tests check that.

    Examples
    --------
    >>> round(growth_factor(1.0), 3)
    0.609
    """
    z = _redshift_iv(z)
    out = _Growth(_resolve_cosmology(cosmo))(z)
    return float(out) if np.ndim(z) == 0 else out


# --------------------------------------------------------------------------------------------
# The linear power spectrum
# --------------------------------------------------------------------------------------------
def _top_hat(x):
    """Fourier transform of a top-hat sphere, 3 (sin x - x cos x) / x^3 (-> 1 as x -> 0)."""
    x = np.asarray(x, dtype=float)
    small = x < 1e-3
    safe = np.where(small, 1.0, x)
    exact = 3.0 * (np.sin(safe) - safe * np.cos(safe)) / safe**3
    return np.where(small, 1.0 - x * x / 10.0, exact)


@dataclass(frozen=True, eq=False)
class LinearPower:
    """The linear matter power spectrum P(k, z) of a cosmology, normalised to sigma8.

    Build with :func:`linear_power` (which validates and fills defaults).

    Attributes
    ----------
    cosmology : astropy FLRW
    sigma8 : float
        rms linear density contrast in spheres of 8 h^-1 Mpc at z = 0.
    n_s : float
        Primordial spectral index.
    wiggles : bool
        Eisenstein & Hu with baryon acoustic oscillations (True) or the no-wiggle shape.
    tcmb_k : float
        CMB temperature used by the transfer function.
    amplitude : float
        A in P(k, 0) = A k^n_s T(k)^2 [Mpc^3 with k in Mpc^-1].
    notes : tuple of str
        Assumptions made while building (defaults filled in).
    """

    cosmology: Any
    sigma8: float
    n_s: float
    wiggles: bool
    tcmb_k: float
    amplitude: float
    notes: tuple[str, ...] = ()
    _model: Any = field(default=None, repr=False)
    _growth: Any = field(default=None, repr=False)

    @property
    def h(self):
        """H0 / (100 km/s/Mpc)."""
        return float(self.cosmology.H0.value) / 100.0

    def transfer(self, k_per_mpc):
        """T(k) of the Eisenstein & Hu fit used (k in Mpc^-1)."""
        k = _k_iv(k_per_mpc)
        out = self._model.transfer(k) if self.wiggles else self._model.no_wiggle(k)
        return float(out) if np.ndim(k) == 0 else out

    def growth_factor(self, z):
        """D(z) / D(0), see :func:`growth_factor`."""
        z = _redshift_iv(z)
        out = self._growth(z)
        return float(out) if np.ndim(z) == 0 else out

    def power_mpc3(self, k_per_mpc, z=0.0):
        """P(k, z) [Mpc^3]; ``k_per_mpc`` and ``z`` broadcast together."""
        k = _k_iv(k_per_mpc)
        z = _redshift_iv(z)
        out = self._power(k, z)
        return float(out) if out.ndim == 0 else out

    def _power(self, k, z=0.0):
        t = self._model.transfer(k) if self.wiggles else self._model.no_wiggle(k)
        growth = 1.0 if np.all(np.asarray(z) == 0) else self._growth(z)
        return self.amplitude * k**self.n_s * t * t * growth * growth

    def sigma_r(self, radius_mpc, z=0.0):
        """rms linear density contrast in top-hat spheres of radius R [Mpc] at z.

        sigma^2(R) = (1 / 2 pi^2) integral k^2 P(k) W(kR)^2 dk with W(x) = 3 (sin x -
        x cos x) / x^3 (Peebles 1980, section 41; from memory), on a fixed ln k grid.
        """
        radius = check_real(radius_mpc, "radius_mpc", 0.0)
        z = float(_redshift_iv(z))
        return math.sqrt(_sigma2(self._power, radius)) * float(self._growth(z))

    def summary(self):
        """One line naming the model and its parameters."""
        shape = "with baryon wiggles" if self.wiggles else "no-wiggle"
        return (f"linear P(k): Eisenstein & Hu 1998 ({shape}), {self.cosmology.name}, "
                f"sigma8 = {self.sigma8:g}, n_s = {self.n_s:g}")


def _sigma2(power, radius):
    k = np.exp(_LNK_GRID)
    integrand = k**3 * power(k) * _top_hat(k * radius) ** 2 / (2.0 * math.pi**2)
    return float(integrate.simpson(integrand, x=_LNK_GRID))


def linear_power(cosmo=None, sigma8=None, n_s=None, wiggles=True):
    """Build the linear power spectrum of a cosmology.

    Parameters
    ----------
    cosmo : astropy FLRW, str or None
        Default Planck18.
    sigma8, n_s : float, optional
        Default the cosmology's own (astropy's realizations carry them in ``meta``), else
        Planck 2018's (:data:`PLANCK18_SIGMA8`, :data:`PLANCK18_N_S`), noted in ``notes``.
    wiggles : bool
        Eisenstein & Hu with baryon features (default) or the no-wiggle shape.

    Returns
    -------
    LinearPower

    Raises
    ------
    InputError
        sigma8 <= 0, n_s outside (0, 2), or a cosmology without matter.

    Examples
    --------
    >>> power = linear_power("Planck18")
    >>> round(power.sigma_r(8.0 / power.h), 4)
    0.8102
    """
    cosmology = _resolve_cosmology(cosmo)
    notes = []
    meta = getattr(cosmology, "meta", {}) or {}
    if sigma8 is None:
        if "sigma8" in meta:
            sigma8 = float(meta["sigma8"])
        else:
            sigma8 = PLANCK18_SIGMA8
            notes.append(f"{cosmology.name} carries no sigma8: Planck 2018's {sigma8} used")
    if n_s is None:
        if "n" in meta:
            n_s = float(meta["n"])
        else:
            n_s = PLANCK18_N_S
            notes.append(f"{cosmology.name} carries no n_s: Planck 2018's {n_s} used")
    sigma8 = check_real(sigma8, "sigma8", 0.0)
    n_s = check_real(n_s, "n_s", 0.0, 2.0, high_open=True)
    if not isinstance(wiggles, bool):
        raise InputTypeError(f"`wiggles` must be True or False; got {wiggles!r}")
    h = float(cosmology.H0.value) / 100.0
    om = float(cosmology.Om0) * h * h
    ob = float(cosmology.Ob0 or 0.0) * h * h
    if om <= 0:
        raise InputError(f"the cosmology must have matter (Om0 > 0); got {cosmology.Om0!r}")
    if ob <= 0:
        notes.append(f"{cosmology.name} has no baryon density (Ob0 = 0): the transfer "
                     "function has no baryon features")
    tcmb_k = float(cosmology.Tcmb0.value)
    if tcmb_k <= 0:
        tcmb_k = DEFAULT_TCMB_K
        notes.append(f"{cosmology.name} has no CMB temperature: T_cmb = {tcmb_k} K used for "
                     "the transfer function")
    model = _EH98(om, ob, tcmb_k)
    growth = _Growth(cosmology)
    unnormalised = LinearPower(cosmology, sigma8, n_s, wiggles, tcmb_k, 1.0, (), model, growth)
    amplitude = sigma8**2 / _sigma2(unnormalised._power, _SIGMA8_RADIUS_MPC_H / h)
    return LinearPower(cosmology, sigma8, n_s, wiggles, tcmb_k, amplitude, tuple(notes), model,
                       growth)
