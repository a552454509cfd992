"""STY: the maximum-likelihood fit of a luminosity- or mass-function shape.

Sandage, Tammann & Yahil 1979 (ApJ 232, 352): each galaxy's luminosity is drawn from the form
restricted to the range it could have at its redshift and still be in the sample, so

    ln L = sum_i w_i [ ln phi(x_i) - ln integral_{lo(z_i)}^{hi(z_i)} phi(x) dx ]

is independent of phi* and of density fluctuations along the line of sight. The weights w_i
are completeness and redshift-sampling weights (1 without them). phi* then follows from the
number of galaxies: phi* = sum_i w_i / integral dV(z) 10^(0.4 P z) S(z), S(z) being the
unit-normalised form integrated over the range visible at z (the Poisson maximum-likelihood
normalisation; Davis & Huchra 1982, ApJ 254, 437 give a minimum-variance variant that needs
the clustering J3 and is not used here).

Topics
------
:class:`STYFit`
    ``STYFit(model, fit_evolution).fit(sample)`` sets ``params_``, ``cov_``, ``form_``,
    ``evolution_``, ``loglike_``, ``n_sources_``; :meth:`STYFit.estimates` gives the
    parameters as :class:`~countscale.estimate.Estimate`; :meth:`STYFit.draw_params` draws
    parameter sets; :meth:`STYFit.nz` is the redshift distribution the fit predicts.
Evolution
    With ``fit_evolution=("Q",)`` the luminosity evolution Q is a free parameter of the same
    likelihood (x = M + Q z moves with it). With ``"P"`` the density evolution is fitted
    afterwards from the redshift distribution of the sample, p(z) proportional to
    dV/dz 10^(0.4 P z) S(z), as in Lin et al. 1999 (ApJ 518, 533; reference from memory); the
    conditional likelihood above cannot see P. P depends on the fitted shape (a steeper
    faint end predicts more nearby galaxies), so its error includes the shape's, by the
    delta method; and a redshift distribution feels large-scale structure along the line of
    sight, which that error does not hold.
Photometric redshifts
    When the sample has redshift errors, the form is convolved with a Gaussian in x of width
    sigma_x = |dg/dz| sigma_z / |s| (the error in the galaxy's luminosity that its redshift
    error causes, with g and s as in :mod:`countscale.lumfunc.selection`), evaluated with
    12-point Gauss-Hermite quadrature, and the range visible at the photometric redshift is
    kept. Assumed: Gaussian redshift errors, small enough that dg/dz is constant across them;
    the volume and the selection are those of the photometric redshift. Measured on mocks
    (tests/test_lumfunc.py) at 0.1 < z < 0.4: with sigma_z = 0.01 it removes the bias of M*
    (from about -0.7 sigma to 0) but leaves alpha 0.2-0.6 sigma too steep; with sigma_z = 0.02
    M*'s bias falls from about -3 to -0.9 sigma and alpha's only from about -2.3 to -1.9
    sigma. It is a first-order correction for modest redshift errors, not a photometric-
    redshift luminosity-function method.

How it is fast
--------------
Without photometric redshifts the visible range depends on z alone, so ln S is computed on the
selection's 2049 redshift nodes and each galaxy's ln S(z_i) is the cubic Lagrange interpolant
in ln z (error below 1e-10); the sum over galaxies is then a fixed weighted sum over the
nodes, prepared once. For a Schechter luminosity function with Q fixed, the sum of ln phi over
galaxies reduces to three sums of the data (with Q free, one of them becomes a weighted sum
over the nodes too). One likelihood evaluation then costs the same for 10^3 or 10^6 galaxies.

Errors
------
The covariance of the shape (and Q) is the inverse of the numerical Hessian of -ln L at the
maximum, with a sandwich correction when the weights are not all 1 (the weighted likelihood
is not a likelihood; Cov = H^-1 J H^-1 with J the weighted outer product of the per-galaxy
scores; not with photometric redshifts, whose weights count as numbers of galaxies).
phi* adds the error of the count: Poisson (sum w_i^2), or the jackknife over the footprint's
regions when there are at least three (which also holds the cosmic variance of
the count), and the shape's error through the selection volume. Small samples: see
:mod:`countscale.lumfunc` ("Small samples").
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence
from typing import Any

import numpy as np
from scipy import integrate, optimize

from countscale._checks import as_generator as _generator
from countscale._checks import finite_scalar as _finite_scalar
from countscale._checks import numerical_hessian as _hessian
from countscale._checks import real_array as _real_array
from countscale.errors import InputError, InputTypeError
from countscale.lumfunc.schechter import Evolution
from countscale.lumfunc.selection import Sample
from countscale.lumfunc.shapes import MODELS, SchechterLuminosity, Shape, shape_for

__all__ = ["LuminosityFunctionFitError", "STYFit", "count_error", "node_weights"]

_LN10 = math.log(10.0)
_C = 0.4 * _LN10
#: Gauss-Hermite nodes for the photometric-redshift convolution.
_N_HERMITE = 12
#: Every 8th node of the selection's grid is enough for phi*'s volume integral (Simpson's
#: rule on 257 nodes uniform in ln z: relative error < 1e-9 for smooth integrands, checked in
#: the tests against the full grid).
_COARSE = 8
#: Largest error in ln(selection volume) accepted from the quadratic expansion used for
#: parameter draws, as a fraction of the count's relative error (so a twentieth of phi*'s
#: own error at the draws farthest from the fit, far less for the rest).
_EXPANSION_TOLERANCE = 0.05


class LuminosityFunctionFitError(RuntimeError):
    """A fit did not converge, or its curvature is not usable (not positive definite)."""


def node_weights(sample: Sample, weight: np.ndarray | None = None) -> np.ndarray:
    """A, with sum_i w_i f(z_i) ~= sum_j A_j f(z_j) for f smooth in ln z (cubic Lagrange).

    ``weight`` replaces the sample's weights w_i when given.
    """
    sel = sample.selection
    ln_z = sel._ln_z
    h = ln_z[1] - ln_z[0]
    u = (np.log(sample.z) - ln_z[0]) / h
    n_nodes = ln_z.size
    j = np.clip(np.floor(u).astype(np.int64), 1, n_nodes - 3)
    t = u - j
    # Lagrange basis on nodes j-1, j, j+1, j+2 at offset t from node j.
    basis = (
        -t * (t - 1.0) * (t - 2.0) / 6.0,
        (t + 1.0) * (t - 1.0) * (t - 2.0) / 2.0,
        -(t + 1.0) * t * (t - 2.0) / 2.0,
        (t + 1.0) * t * (t - 1.0) / 6.0,
    )
    a = np.zeros(n_nodes)
    w = sample.weight if weight is None else weight
    for k, b in enumerate(basis):
        a += np.bincount(j + k - 1, weights=w * b, minlength=n_nodes)
    return a


def count_error(sample: Sample, total: float | None = None) -> dict[str, Any]:
    """Relative error of the weighted count sum_i w_i, Poisson and (with regions) jackknife.

    Returns ``{"poisson": rel var, "jackknife": rel var or None, "n_regions": int}``. The
    jackknife drops one region at a time and rescales the count by the solid angle kept
    (sum over regions with area > 0; at least 3 needed).
    """
    w = sample.weight
    total = float(w.sum()) if total is None else total
    out: dict[str, Any] = {"poisson": float((w**2).sum()) / total**2, "jackknife": None,
                           "n_regions": 0}
    if sample.region is None:
        return out
    areas = sample.region_area_sr
    per_region = np.bincount(sample.region, weights=w, minlength=areas.size)
    used = areas > 0
    n_regions = int(used.sum())
    out["n_regions"] = n_regions
    if n_regions < 3:
        return out
    omega = float(areas[used].sum())
    kept = (total - per_region[used]) / ((omega - areas[used]) / omega)
    var = (n_regions - 1) / n_regions * float(((kept - kept.mean()) ** 2).sum())
    out["jackknife"] = var / total**2
    return out


class STYFit:
    """Maximum-likelihood (STY) fit of a Schechter or double-Schechter shape.

    Parameters
    ----------
    model : {"schechter", "double_schechter"}
        ``double_schechter`` only for stellar-mass samples (Baldry et al. 2012 form).
    fit_evolution : sequence of {"Q", "P"}
        Evolution parameters to fit (luminosity samples); the others stay at the
        selection's values.
    start : sequence of float, optional
        Starting shape parameters (see :mod:`countscale.lumfunc.shapes` for their order).

    Attributes (after :meth:`fit`)
    -------------------------------
    params_ : dict of str to float
        Published names (``m_star``, ``alpha``, ``phi_star``; or the mass names) plus ``Q``
        and ``P``.
    cov_ : ndarray
        Covariance of ``cov_names_`` (the free shape parameters, ``Q`` if fitted, ``P`` if
        fitted, then the normalisation).
    cov_names_ : tuple of str
    form_ : Schechter, SchechterMass or DoubleSchechterMass
        The fitted form at z = 0, normalisation included.
    evolution_ : Evolution
    loglike_ : float
        The maximised weighted ln L (conditional, so only differences mean anything).
    n_sources_ : int
    normalisation_ : dict
        ``sum_of_weights``, ``volume_term`` [Mpc^3], the count's relative variances.

    Examples
    --------
    >>> from countscale.lumfunc import Schechter, Selection      # doctest: +SKIP
    >>> fit = STYFit().fit(sample)                               # doctest: +SKIP
    >>> fit.params_["m_star"], fit.estimates()["alpha"]          # doctest: +SKIP
    """

    def __init__(self, model: str = "schechter", fit_evolution: Sequence[str] = (),
                 start: Sequence[float] | None = None) -> None:
        self.model = model
        self.fit_evolution = fit_evolution
        self.start = start

    # ---- validation ----------------------------------------------------------------------
    def _iv(self, sample: Any) -> tuple[Shape, bool, bool]:
        if not isinstance(sample, Sample):
            raise InputTypeError(f"`sample` must be a lumfunc Sample; got {type(sample).__name__}")
        if self.model not in MODELS:
            raise InputError(f"`model` must be one of {', '.join(MODELS)}; got {self.model!r}")
        shape = shape_for(self.model, sample.quantity)
        fe = self.fit_evolution
        if isinstance(fe, str) or not isinstance(fe, Sequence):
            raise InputTypeError(f"`fit_evolution` must be a list of 'Q' and 'P'; got {fe!r}")
        unknown = [p for p in fe if p not in ("Q", "P")]
        if unknown:
            raise InputError(f"`fit_evolution` may hold 'Q' and 'P'; got {unknown[0]!r}")
        if fe and sample.quantity != "luminosity":
            raise InputError(
                f"`fit_evolution` {list(fe)} applies to luminosity functions; got a "
                f"{sample.quantity} sample"
            )
        if self.start is not None and len(self.start) != len(shape.names):
            raise InputError(
                f"`start` must give {len(shape.names)} values ({', '.join(shape.names)}); got "
                f"{len(self.start)}"
            )
        return shape, "Q" in fe, "P" in fe

    # ---- the likelihood ------------------------------------------------------------------
    def _objective(self, sample: Sample, shape: Shape, fit_q: bool) -> Any:
        """-ln L as a function of theta (shape parameters, then Q when fitted)."""
        q0 = sample.selection.evolution.Q
        n_shape = len(shape.names)
        z = sample.z
        w = sample.weight
        if sample.redshift_error is not None and np.any(sample.redshift_error > 0):
            return self._objective_photometric(sample, shape, fit_q)
        a = node_weights(sample)
        used = np.flatnonzero(a != 0.0)
        a_used = a[used]
        sel = sample.selection
        d_used = sel._d_nodes[used]
        z_used = sel._z[used]
        value = sample.value
        # Schechter luminosity functions: sum_i w_i ln phi(x_i) needs only sum w, sum w x and
        # sum w exp(-C x); with Q free, x = M + Q z and the last is sum_j B_j exp(-C Q z_j)
        # over the nodes (B: node weights of w exp(-C M); exp(-C Q z) is smooth in ln z).
        quick = isinstance(shape, SchechterLuminosity)
        if quick:
            x = sample.x(q0)
            x_ref = float(np.median(x))
            w_sum = float(w.sum())
            wx_sum = float(w @ x)
            wu_sum = float(w @ np.exp(-_C * (x - x_ref)))
            if fit_q:
                wm_sum, wz_sum = float(w @ value), float(w @ z)
                b_nodes = node_weights(sample, w * np.exp(-_C * (value - x_ref)))
                b_used = np.flatnonzero(b_nodes != 0.0)
                b_z, b_w = sel._z[b_used], b_nodes[b_used]

        def nll(theta: np.ndarray) -> float:
            shape_theta = theta[:n_shape]
            if not shape.valid(shape_theta):
                return math.inf
            q = theta[n_shape] if fit_q else q0
            if quick:
                m_star, alpha = shape_theta
                sum_x, sum_u = wx_sum, wu_sum
                if fit_q:
                    sum_x = wm_sum + q * wz_sum
                    with np.errstate(over="ignore"):
                        sum_u = float(b_w @ np.exp(-_C * q * b_z))
                with np.errstate(over="ignore"):
                    data = (w_sum * math.log(_C) + (alpha + 1.0) * _C * (w_sum * m_star - sum_x)
                            - math.exp(min(_C * (m_star - x_ref), 700.0)) * sum_u)
            else:
                x = value + q * z if sample.quantity == "luminosity" and q else value
                data = float(w @ shape.log_density(shape_theta, x))
            g = d_used - q * z_used if sample.quantity == "luminosity" else d_used
            lo, hi = sample.limits_from_g(g)
            with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
                s = shape.integral(shape_theta, lo, hi)
                norm = float(a_used @ np.log(s))
            result = -(data - norm)
            return result if math.isfinite(result) else math.inf

        return nll

    def _objective_photometric(self, sample: Sample, shape: Shape, fit_q: bool) -> Any:
        q0 = sample.selection.evolution.Q
        n_shape = len(shape.names)
        z = sample.z
        w = sample.weight
        t, gh_w = np.polynomial.hermite.hermgauss(_N_HERMITE)
        ln_a = np.log(gh_w / math.sqrt(math.pi))
        s_scale = 1.0 if sample.quantity == "luminosity" else 2.5
        sel = sample.selection

        def per_galaxy(q: float) -> tuple[np.ndarray, ...]:
            """x, the visible range and the Gauss-Hermite shifts of every galaxy at Q = q."""
            g = sample.g_nodes(q)
            slope = np.gradient(g, sel._z)
            sigma = np.abs(np.interp(z, sel._z, slope)) * sample.redshift_error / s_scale
            lo, hi = sample.limits(z, q)
            return sample.x(q), lo, hi, math.sqrt(2.0) * sigma[:, None] * t[None, :]

        fixed = None if fit_q else per_galaxy(q0)

        def nll(theta: np.ndarray) -> float:
            shape_theta = theta[:n_shape]
            if not shape.valid(shape_theta):
                return math.inf
            q = theta[n_shape] if fit_q else q0
            x, lo, hi, shift = fixed if fixed is not None else per_galaxy(q)
            with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
                log_terms = ln_a[None, :] + shape.log_density(shape_theta, x[:, None] - shift)
                data = float(w @ np.logaddexp.reduce(log_terms, axis=1))
                lo_s, hi_s = lo[:, None] - shift, hi[:, None] - shift
                table = _TailTable(shape, shape_theta, float(lo_s.min()), float(hi_s.max()))
                s = np.abs(table(hi_s) - table(lo_s))
                norm = float(w @ np.log(s @ np.exp(ln_a)))
            result = -(data - norm)
            return result if math.isfinite(result) else math.inf

        return nll

    # ---- normalisation -------------------------------------------------------------------
    def _volume_term(self, sample: Sample, shape: Shape, shape_theta: np.ndarray, q: float,
                     p: float, coarse: bool = True) -> float:
        """integral dV(z) 10^(0.4 P z) S(z) [Mpc^3], S the unit-normalised visible fraction."""
        sel = sample.selection
        step = _COARSE if coarse else 1
        z = sel._z[::step]
        g = sel._d_nodes[::step] - (q * z if sample.quantity == "luminosity" else 0.0)
        lo, hi = sample.limits_from_g(g)
        s = shape.integral(shape_theta, lo, hi)
        weight = sel._dv_dlnz[::step] * 10.0 ** (0.4 * p * z)
        return float(integrate.simpson(weight * s, x=sel._ln_z[::step]))

    # ---- fitting -------------------------------------------------------------------------
    def fit(self, sample: Sample) -> STYFit:
        """Fit the shape (and Q, P when asked) to a :class:`Sample`; returns ``self``."""
        shape, fit_q, fit_p = self._iv(sample)
        sel = sample.selection
        q0, p0 = sel.evolution.Q, sel.evolution.P
        nll = self._objective(sample, shape, fit_q)
        x0 = sample.x(q0)
        start = (np.asarray(self.start, dtype=float) if self.start is not None
                 else shape.start(x0, sample.weight))
        theta0 = np.append(start, q0) if fit_q else start
        steps = np.array(shape.steps + ((0.01,) if fit_q else ()))
        photometric = sample.redshift_error is not None and bool(np.any(sample.redshift_error > 0))
        if photometric:
            # Start from the fit that takes the redshifts as exact (fast), then convolve.
            exact = dataclasses.replace(sample, redshift_error=None)
            theta0 = _minimise(self._objective(exact, shape, fit_q), theta0, steps)
        theta = _minimise(nll, theta0, steps)
        hessian = _hessian(nll, theta, steps)
        cov = _inverse_covariance(hessian, shape.names + (("Q",) if fit_q else ()))
        if not np.allclose(sample.weight, 1.0) and not photometric:
            cov = self._sandwich(sample, shape, fit_q, theta, cov, steps)

        n_shape = len(shape.names)
        shape_theta = theta[:n_shape]
        q = float(theta[n_shape]) if fit_q else q0
        p, p_var, p_cross = p0, 0.0, None
        if fit_p:
            p, p_var = self._fit_density_evolution(sample, shape, shape_theta, q, p0)
            # P is fitted at the STY shape; its error also carries the shape's, by the delta
            # method: dP/dtheta from refits at theta +- one step.
            jac = np.empty(theta.size)
            for i, step in enumerate(steps):
                e = np.zeros(theta.size)
                e[i] = step
                up, down = theta + e, theta - e
                p_up, _ = self._fit_density_evolution(
                    sample, shape, up[:n_shape], float(up[n_shape]) if fit_q else q, p)
                p_down, _ = self._fit_density_evolution(
                    sample, shape, down[:n_shape], float(down[n_shape]) if fit_q else q, p)
                jac[i] = (p_up - p_down) / (2 * step)
            p_cross = cov @ jac
            p_var = p_var + float(jac @ cov @ jac)
        volume = self._volume_term(sample, shape, shape_theta, q, p)
        w_sum = float(sample.weight.sum())
        norm = w_sum / volume
        count = count_error(sample, w_sum)
        count_var = count["jackknife"] if count["jackknife"] is not None else count["poisson"]

        # d ln(volume) / d(theta, Q, P), for the normalisation's share of the shape's error.
        def ln_volume(vec: np.ndarray) -> float:
            qq = vec[n_shape] if fit_q else q
            pp = vec[-1] if fit_p else p
            return math.log(self._volume_term(sample, shape, vec[:n_shape], qq, pp))

        full = np.concatenate([theta, [p] if fit_p else []])
        full_steps = np.concatenate([steps, [0.01] if fit_p else []])
        grad = np.array([(ln_volume(full + e) - ln_volume(full - e)) / (2 * e[i])
                         for i, e in enumerate(np.diag(full_steps))])
        k = full.size
        cov_full = np.zeros((k + 1, k + 1))
        cov_full[: theta.size, : theta.size] = cov
        if fit_p:
            cov_full[k - 1, k - 1] = p_var
            cov_full[k - 1, : theta.size] = cov_full[: theta.size, k - 1] = p_cross
        # norm = W / volume: d norm = -norm d ln volume (+ the count's own error).
        cross = -norm * (cov_full[:k, :k] @ grad)
        cov_full[k, :k] = cov_full[:k, k] = cross
        cov_full[k, k] = norm**2 * (grad @ cov_full[:k, :k] @ grad + count_var)

        self.shape_ = shape
        self.sample_ = sample
        self.theta_ = theta
        self.form_ = shape.form(shape_theta, norm)
        self.evolution_ = Evolution(Q=q, P=p)
        self.fitted_evolution_ = tuple(n for n, f in (("Q", fit_q), ("P", fit_p)) if f)
        self.cov_names_ = (shape.names + (("Q",) if fit_q else ()) + (("P",) if fit_p else ())
                           + (shape.norm_name,))
        self.cov_ = cov_full
        self.params_ = {**shape.published(shape_theta, norm), "Q": q, "P": p}
        self.loglike_ = -float(nll(theta))
        self.n_sources_ = sample.n
        self.normalisation_ = {
            "sum_of_weights": w_sum,
            "volume_term_mpc3": volume,
            "count_relative_variance": count_var,
            "poisson_relative_variance": count["poisson"],
            "jackknife_relative_variance": count["jackknife"],
            "n_regions": count["n_regions"],
            "shape_relative_variance": float(grad @ cov_full[:k, :k] @ grad),
        }
        return self

    def _sandwich(self, sample: Sample, shape: Shape, fit_q: bool, theta: np.ndarray,
                  cov: np.ndarray, steps: np.ndarray) -> np.ndarray:
        """H^-1 J H^-1 with J = sum_i w_i^2 s_i s_i^T, s_i the per-galaxy score."""
        n_shape = len(shape.names)
        q0 = sample.selection.evolution.Q
        sel = sample.selection

        def per_galaxy(vec: np.ndarray) -> np.ndarray:
            q = vec[n_shape] if fit_q else q0
            x = sample.x(q)
            g = sample.g_nodes(q)
            lo, hi = sample.limits_from_g(g)
            with np.errstate(divide="ignore"):
                ln_s = np.log(shape.integral(vec[:n_shape], lo, hi))
            return shape.log_density(vec[:n_shape], x) - np.interp(
                np.log(sample.z), sel._ln_z, ln_s)

        scores = np.empty((sample.n, theta.size))
        for i, step in enumerate(steps):
            e = np.zeros(theta.size)
            e[i] = step
            scores[:, i] = (per_galaxy(theta + e) - per_galaxy(theta - e)) / (2 * step)
        weighted = scores * sample.weight[:, None]
        j = weighted.T @ weighted
        return cov @ j @ cov

    def _fit_density_evolution(self, sample: Sample, shape: Shape, shape_theta: np.ndarray,
                               q: float, p0: float) -> tuple[float, float]:
        """P from the redshift distribution: max of sum w_i 0.4 ln10 P z_i - W ln V(P)."""
        w = sample.weight
        w_sum = float(w.sum())
        wz = float(w @ sample.z)

        def minus_loglike(p: float) -> float:
            volume = self._volume_term(sample, shape, shape_theta, q, p, coarse=False)
            return -(_C * p * wz - w_sum * math.log(volume))

        result = optimize.minimize_scalar(minus_loglike, bracket=(p0 - 1.0, p0 + 1.0))
        if not result.success or not math.isfinite(result.x):
            raise LuminosityFunctionFitError(
                f"the density evolution P did not converge ({result.message})")
        p = float(result.x)
        h = 0.02
        curvature = (minus_loglike(p + h) - 2 * minus_loglike(p) + minus_loglike(p - h)) / h**2
        if not curvature > 0:
            raise LuminosityFunctionFitError(
                f"the likelihood of P = {p:.3g} has no usable curvature ({curvature!r})")
        return p, 1.0 / curvature

    # ---- using the fit -------------------------------------------------------------------
    def _fitted(self) -> None:
        if not hasattr(self, "form_"):
            raise InputError("this STYFit is not fitted yet: call fit(sample) first")

    def draw_params(self, n: int, rng: Any = None) -> dict[str, np.ndarray]:
        """Draw ``n`` parameter sets from the fit's uncertainty.

        Shape parameters (and fitted Q, P) from the normal distribution of their covariance;
        the normalisation for each draw from the count (normal with the count's relative
        error) divided by that draw's selection volume, so it carries its correlation with
        the shape. Returns the published names, plus ``Q`` and ``P``, as arrays of ``n``.
        """
        self._fitted()
        if isinstance(n, bool) or not isinstance(n, int | np.integer) or n < 1:
            raise InputError(f"`n` must be a positive integer; got {n!r}")
        gen = _generator(rng)
        k = len(self.cov_names_) - 1
        centre = np.concatenate([self.theta_, [self.evolution_.P] if "P" in
                                 self.fitted_evolution_ else []])
        cov = self.cov_[:k, :k]
        draws = gen.multivariate_normal(centre, cov, size=int(n), method="eigh")
        rel = math.sqrt(self.normalisation_["count_relative_variance"])
        factor = np.clip(1.0 + rel * gen.standard_normal(int(n)), 1e-3, None)
        shape = self.shape_
        n_shape = len(shape.names)
        w_sum = self.normalisation_["sum_of_weights"]
        fitted_q = "Q" in self.fitted_evolution_
        fitted_p = "P" in self.fitted_evolution_

        def split(row: np.ndarray) -> tuple[np.ndarray, float, float]:
            theta = row[:n_shape]
            if not shape.valid(theta):
                theta = self.theta_[:n_shape]
            q = float(row[n_shape]) if fitted_q else self.evolution_.Q
            p = float(row[-1]) if fitted_p else self.evolution_.P
            return theta, q, p

        def ln_volume(row: np.ndarray) -> float:
            theta, q, p = split(row)
            return math.log(self._volume_term(self.sample_, shape, theta, q, p))

        ln_v = self._ln_volume_quadratic(draws, centre, ln_volume)
        out: dict[str, list[float]] = {}
        for row, f, lv in zip(draws, factor, ln_v, strict=True):
            theta, q, p = split(row)
            values = {**shape.published(theta, w_sum * f / math.exp(lv)), "Q": q, "P": p}
            for name, value in values.items():
                out.setdefault(name, []).append(value)
        return {name: np.asarray(values) for name, values in out.items()}

    def _ln_volume_quadratic(self, draws: np.ndarray, centre: np.ndarray, ln_volume: Any
                             ) -> np.ndarray:
        """ln(selection volume) of every draw: a second-order expansion about the fit, checked
        against the exact value at the 8 draws farthest from it (exact for all draws when any
        of those is off by more than ``_EXPANSION_TOLERANCE`` of the count's relative error;
        the expansion saves ~1000 incomplete-gamma
        integrals per call)."""
        steps = np.array(self.shape_.steps + ((0.01,) if "Q" in self.fitted_evolution_ else ())
                         + ((0.01,) if "P" in self.fitted_evolution_ else ()))
        if not hasattr(self, "_ln_volume_expansion_"):
            from countscale._checks import numerical_gradient

            self._ln_volume_expansion_ = (ln_volume(centre),
                                          numerical_gradient(ln_volume, centre, steps),
                                          _hessian(ln_volume, centre, steps))
        value, grad, hess = self._ln_volume_expansion_
        delta = draws - centre
        approx = value + delta @ grad + 0.5 * np.einsum("ij,jk,ik->i", delta, hess, delta)
        far = np.argsort(np.einsum("ij,ij->i", delta / steps, delta / steps))[-8:]
        exact = np.array([ln_volume(draws[i]) for i in far])
        tolerance = _EXPANSION_TOLERANCE * math.sqrt(self.normalisation_["count_relative_variance"])
        if np.max(np.abs(exact - approx[far])) > tolerance:
            return np.array([ln_volume(row) for row in draws])
        return approx

    def estimates(self, n_draws: int = 1000, rng: Any = None,
                  draws: dict[str, np.ndarray] | None = None) -> dict[str, Any]:
        """The parameters and derived densities as Estimates (from :meth:`draw_params`, or
        from ``draws`` already made by it).

        Keys: the published names, ``Q``/``P`` when fitted; for luminosity functions
        ``luminosity_density_mag`` [mag Mpc^-3] (M* - 2.5 log10(phi* Gamma(alpha + 2)), all
        galaxies; absent when alpha <= -2 in any draw) and ``number_density_mpc3`` (galaxies
        brighter than the faintest x of the sample); for mass functions
        ``mass_density_msun_mpc3`` and ``number_density_mpc3`` above the lowest mass of the
        sample. Budgets: the shape's error is sampling noise (``poisson``); the
        normalisation's splits ``poisson`` and ``cosmic_variance`` (the jackknife's excess
        over Poisson).
        """
        from countscale.estimate import Estimate

        if draws is None:
            draws = self.draw_params(n_draws, rng)
        units = {"m_star": "mag", "alpha": "", "alpha_1": "", "alpha_2": "",
                 "log10_mass_star": "dex", "phi_star": "Mpc^-3", "phi_star_1": "Mpc^-3 dex^-1",
                 "phi_star_2": "Mpc^-3 dex^-1", "Q": "mag", "P": ""}
        if self.sample_.quantity == "stellar_mass":
            units["phi_star"] = "Mpc^-3 dex^-1"
        norm_budget = self._norm_budget()
        out: dict[str, Any] = {}
        for name, values in draws.items():
            if name in ("Q", "P") and name not in self.fitted_evolution_:
                continue
            is_norm = name.startswith("phi_star")
            out[name] = Estimate.from_draws(values, units[name],
                                            budget=norm_budget if is_norm else {"poisson": 1.0})
        # Number densities down to the sample's faintest luminosity (lowest mass): the
        # range the data reach, so no extrapolation of the faint end.
        limit = float(self.sample_.x(self.evolution_.Q).max() if
                      self.sample_.quantity == "luminosity" else self.sample_.value.min())
        n_draws_made = len(next(iter(draws.values())))
        number, density = [], []
        for i in range(n_draws_made):
            form = self.form_from_draws(draws, i)
            number.append(float(form.number_density_above(limit)))
            if self.sample_.quantity == "luminosity":
                if form.alpha > -2:
                    density.append(form.luminosity_density_mag())
            else:
                try:
                    density.append(form.mass_density_msun_mpc3())
                except InputError:
                    pass
        out["number_density_mpc3"] = Estimate.from_draws(number, "Mpc^-3", budget=norm_budget)
        if len(density) == n_draws_made:
            if self.sample_.quantity == "luminosity":
                out["luminosity_density_mag"] = Estimate.from_draws(density, "mag Mpc^-3",
                                                                    budget=norm_budget)
            else:
                out["mass_density_msun_mpc3"] = Estimate.from_draws(density, "Msun Mpc^-3",
                                                                    budget=norm_budget)
        self.density_limit_ = limit
        return out

    def form_from_draws(self, draws: dict[str, np.ndarray], i: int) -> Any:
        """The form (at z = 0) of draw ``i`` of :meth:`draw_params`' output."""
        kind = type(self.form_)
        names = self.shape_.published_names
        return kind(**{name: float(draws[name][i]) for name in names})

    def _norm_budget(self) -> dict[str, float]:
        info = self.normalisation_
        poisson = info["poisson_relative_variance"] + info["shape_relative_variance"]
        cosmic = 0.0
        if info["jackknife_relative_variance"] is not None:
            cosmic = max(info["jackknife_relative_variance"] - info["poisson_relative_variance"],
                         0.0)
        total = poisson + cosmic
        if total <= 0:
            return {"poisson": 1.0}
        return {"poisson": poisson / total, "cosmic_variance": cosmic / total}

    def nz(self, z: Any, m_limit: float, area_sr: float | None = None) -> np.ndarray:
        """Predicted redshift distribution dN/dz of sources brighter than ``m_limit``.

        Parameters
        ----------
        z : array_like
            Redshifts >= 0 (any, also beyond the fitted range: the evolution and the
            K-correction are then extrapolated, which the caller should say); 0 at z = 0.
        m_limit : float
            Apparent magnitude limit (same band as the fit).
        area_sr : float, optional
            Solid angle [sr]; default: per steradian.

        Returns
        -------
        ndarray
            dN/dz [per unit z, per sr or over ``area_sr``] =
            dV/dz/dOmega phi*(0) 10^(0.4 P z) n_shape(< m_limit - DM - K + Q z), from the
            fitted form, evolution and K-correction, in the sample's cosmology.
        """
        self._fitted()
        if self.sample_.quantity != "luminosity":
            raise InputError("`nz` needs a luminosity function (a mass function has no "
                             "apparent-magnitude limit)")
        zz = _real_array("z", z)
        bad = ~np.isfinite(zz) | (zz < 0)
        if bad.any():
            raise InputError(f"`z` must be finite and >= 0; got {float(zz[bad].flat[0])!r}")
        m_lim = _finite_scalar("m_limit", m_limit)
        sel = self.sample_.selection
        scale = 1.0
        if area_sr is not None:
            scale = _finite_scalar("area_sr", area_sr)
            if not 0 < scale <= 4 * math.pi * (1 + 1e-12):
                raise InputError(f"`area_sr` must be in (0, 4 pi] sr; got {scale!r}")
        flat = zz.ravel()
        out = np.zeros(flat.size)
        positive = flat > 0  # dN/dz = 0 at z = 0 (no volume)
        zp = flat[positive]
        if zp.size == 0:
            return out.reshape(zz.shape)
        d = (np.asarray(sel.cosmo.distmod(zp).value, dtype=float)
             + np.asarray(sel.kcorrection(zp), dtype=float))
        evo = self.evolution_
        x_lim = m_lim - d + evo.Q * zp
        dv = np.asarray(sel.cosmo.differential_comoving_volume(zp).value, dtype=float)
        n_brighter = self.form_._bright_tail(x_lim)
        out[positive] = scale * dv * 10.0 ** (0.4 * evo.P * zp) * n_brighter
        return out.reshape(zz.shape)

    def to_json(self, estimates: dict[str, Any]) -> dict[str, Any]:
        """JSON-ready summary (see the stage's results keys)."""
        out: dict[str, Any] = {"model": self.model, "quantity": self.sample_.quantity}
        for name, estimate in estimates.items():
            out[name] = estimate.to_json()
        out["values"] = {k: float(v) for k, v in self.params_.items()}
        out["covariance"] = {"names": list(self.cov_names_),
                             "matrix": [[float(v) for v in row] for row in self.cov_]}
        out["evolution"] = {"Q": self.evolution_.Q, "P": self.evolution_.P,
                            "fitted": list(self.fitted_evolution_)}
        out["n_sources"] = self.n_sources_
        out["loglike"] = self.loglike_
        out["normalisation"] = dict(self.normalisation_)
        if hasattr(self, "density_limit_"):
            out["number_density_limit"] = self.density_limit_
        return out


class _TailTable:
    """A form's bright tail B(x) on a uniform grid, interpolated by cubic Hermite polynomials
    through the exact values and slopes (B' = -+ the density): relative error ~1e-10 with 4097
    nodes over the ranges galaxies span, at the cost of a few multiplications per point."""

    def __init__(self, shape: Shape, theta: np.ndarray, lo: float, hi: float,
                 n: int = 4097) -> None:
        form = shape.form(theta)
        self.x = np.linspace(lo, hi, n)
        self.h = float(self.x[1] - self.x[0])
        self.b = form._bright_tail(self.x)
        sign = 1.0 if form._brighter_at_larger_x else -1.0
        self.slope = -sign * form._density(self.x)

    def __call__(self, x: np.ndarray) -> np.ndarray:
        u = (x - self.x[0]) / self.h
        j = np.clip(np.floor(u).astype(np.int64), 0, self.x.size - 2)
        t = u - j
        t2, t3 = t * t, t * t * t
        h00, h10 = 2 * t3 - 3 * t2 + 1, t3 - 2 * t2 + t
        h01, h11 = -2 * t3 + 3 * t2, t3 - t2
        return (h00 * self.b[j] + h10 * self.h * self.slope[j]
                + h01 * self.b[j + 1] + h11 * self.h * self.slope[j + 1])


def _minimise(nll: Any, theta0: np.ndarray, steps: np.ndarray) -> np.ndarray:
    """BFGS on -ln L, then Newton steps on the numerical Hessian to polish."""
    if not math.isfinite(nll(theta0)):
        # A poor start (e.g. a form that underflows over a galaxy's range): search nearby.
        for scale in (0.5, 1.0, 2.0):
            for shift in np.eye(theta0.size):
                for sign in (-1, 1):
                    trial = theta0 + sign * scale * shift
                    if math.isfinite(nll(trial)):
                        theta0 = trial
                        break
                else:
                    continue
                break
            if math.isfinite(nll(theta0)):
                break
        else:
            raise LuminosityFunctionFitError(
                "STY: the likelihood is not finite at the starting point or near it")
    result = optimize.minimize(nll, theta0, method="Nelder-Mead",
                               options={"xatol": 1e-4, "fatol": 1e-6, "maxiter": 4000,
                                        "initial_simplex": _simplex(theta0, 10 * steps)})
    theta = result.x
    for _ in range(6):
        hessian = _hessian(nll, theta, steps)
        grad = np.array([(nll(theta + e) - nll(theta - e)) / (2 * e[i])
                         for i, e in enumerate(np.diag(steps))])
        try:
            step = np.linalg.solve(hessian, grad)
        except np.linalg.LinAlgError:
            break
        if not np.all(np.isfinite(step)) or np.any(np.abs(step) > 20 * steps):
            break
        trial = theta - step
        if nll(trial) > nll(theta) + 1e-9:
            break
        theta = trial
        if np.all(np.abs(step) < 1e-6 * np.maximum(1.0, np.abs(theta))):
            break
    if not math.isfinite(nll(theta)):
        raise LuminosityFunctionFitError("STY: the fit ended where the likelihood is not finite")
    return theta


def _simplex(theta0: np.ndarray, size: np.ndarray) -> np.ndarray:
    return np.vstack([theta0] + [theta0 + np.diag(size)[i] for i in range(theta0.size)])


def _inverse_covariance(hessian: np.ndarray, names: tuple[str, ...]) -> np.ndarray:
    try:
        eigen = np.linalg.eigvalsh(hessian)
    except np.linalg.LinAlgError as exc:
        raise LuminosityFunctionFitError(f"STY: the Hessian is not usable ({exc})") from None
    if not (np.all(np.isfinite(eigen)) and eigen.min() > 0):
        raise LuminosityFunctionFitError(
            f"STY: the likelihood has no maximum in ({', '.join(names)}) — the Hessian's "
            f"eigenvalues are {np.array2string(eigen, precision=3)}; the sample may not "
            "constrain the shape (too few galaxies, or too narrow a range of luminosity)"
        )
    return np.linalg.inv(hessian)
