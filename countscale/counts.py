"""Number counts: count models, a forward-modelled Poisson fit, integral and differential counts.

The number counts n(m) are the surface density of sources per deg^2 per magnitude as a function
of (true, AB) magnitude. A survey does not see n(m) directly: it detects a fraction of the
sources (completeness), over a finite area, and measures their magnitudes with an error that
grows towards the limit. This module fits n(m) through a *forward model* of the observed binned
counts, so completeness, effective area and photometric scatter (Eddington bias) are folded in
rather than divided out.

Contents
--------
Count models (base :class:`CountModel`; public ``density``, ``log10_density``, ``local_slope``,
``integral``, ``cumulative``, ``with_params``)
    :class:`PowerLaw` (``log10_norm``, ``slope``),
    :class:`BrokenPowerLaw` (``log10_norm``, ``slope_bright``, ``slope_faint``, ``m_break``;
    sharp break), :class:`DoublePowerLaw` (the same parameters, smooth transition of width
    ``transition_mag``). ``log10_norm`` is log10 n at ``reference_mag`` (per deg^2 per mag).
Forward model
    :class:`ForwardModel`: expected observed counts per bin for a count model, a magnitude-
    dependent effective area and a magnitude-dependent Gaussian scatter.
Fitting
    :class:`CountsFit` (scikit-learn style: ``fit`` sets ``params_``, ``cov_``, ``loglike_``,
    ``deviance_``, ``p_value_``, ``aic_``, ``bic_``, ...; ``profile_interval``), :func:`fit_counts`,
    :func:`compare_models` / :class:`ModelComparison` (AIC/BIC).
Results
    :class:`IntegralCounts` / :func:`integral_counts` (N(<m) per deg^2 and over the footprint),
    :class:`DifferentialCounts` / :func:`differential_counts` (raw and corrected binned counts
    with Poisson and Poisson + clustering intervals, for tables and plots).
Helpers
    :func:`scatter_from_errors` / :class:`ScatterRelation` (sigma(m) from quoted errors),
    :func:`poisson_interval` (Garwood), :func:`jackknife_covariance`,
    :func:`combine_covariances` (Poisson floor + clustering excess).
Warnings and errors
    :class:`CountsWarning`, :class:`CountsFitError`; :class:`NotFittedError` (shared with
    :mod:`countscale.completeness`).

Conventions
-----------
Magnitudes are AB; fainter is larger m. ``slope`` is d log10 n / dm (0.6 for uniformly
distributed sources in static Euclidean space). Densities are per deg^2 per mag, integrated
densities N(<m) per deg^2, effective areas in deg^2. Completeness and scatter are functions of
the *true* magnitude (as measured by injecting sources of known magnitude).

What this module does not do: it does not bin catalogues (the tally does) and it does not
compute analytic cosmic variance (the variance module does). Clustering enters only through
the jackknife over footprint regions, which works on per-region binned counts.
"""

from __future__ import annotations

import dataclasses
import itertools
import math
import numbers
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import ClassVar

import numpy as np
from scipy import linalg, optimize, special, stats

from countscale._checks import as_generator as _as_generator
from countscale._checks import as_magnitudes as _as_magnitudes
from countscale._checks import check_real
from countscale._checks import numerical_gradient as _numerical_gradient
from countscale._checks import numerical_hessian as _numerical_hessian
from countscale._checks import read_only as _read_only
from countscale.completeness import NotFittedError, pool_adjacent_violators
from countscale.errors import InputError, InputTypeError
from countscale.estimate import Estimate

__all__ = [
    "MIN_SOURCES",
    "BrokenPowerLaw",
    "CountModel",
    "CountsFit",
    "CountsFitError",
    "CountsWarning",
    "DifferentialCounts",
    "DoublePowerLaw",
    "ForwardModel",
    "IntegralCounts",
    "ModelComparison",
    "NotFittedError",
    "PowerLaw",
    "ScatterRelation",
    "combine_covariances",
    "compare_models",
    "differential_counts",
    "fit_counts",
    "format_p_bound",
    "integral_counts",
    "jackknife_covariance",
    "poisson_interval",
    "scatter_from_errors",
]

#: Fewest sources in a fit before it warns (fewer than 20 sources in a fit is doubtful;
#: common figure, no source).
MIN_SOURCES = 20

#: Completeness below which a bin used in a fit triggers a warning (common figure, no source).
LOW_COMPLETENESS = 0.5

#: ln 10, for converting d log10 n / dm into an exponential rate.
_LN10 = math.log(10.0)

#: Gauss-Legendre nodes and weights for the generic numerical integral (8 nodes per panel of at
#: most 0.1 mag integrate exp(a m) with a <= 3 ln 10 per mag to ~1e-15 relative; Gauss-Legendre
#: with n nodes is exact for polynomials of degree 2n - 1).
_GL_NODES, _GL_WEIGHTS = np.polynomial.legendre.leggauss(8)
_GL_PANEL_MAG = 0.1

#: The bright tail of a smooth double power law is integrated analytically beyond this many
#: transition widths brighter than the break, where the model is a pure power law to relative
#: 10^-40 (log10(1 + 10^-40) ~ 4e-41; closed form).
_TAIL_TRANSITIONS = 40.0

#: Unit strings used in Estimates.
_DENSITY_UNIT = "deg^-2 mag^-1"
_CUMULATIVE_UNIT = "deg^-2"

#: Budget labels of the Estimate JSON (docs/reference.md): the clustering part of the
#: jackknife variance is the
#: sample ("cosmic") variance of the counts between regions.
_POISSON = "poisson"
_CLUSTERING = "cosmic_variance"
#: Budget name of the subtracted stars' Poisson noise (a star catalogue of the same survey).
_STARS = "stars"


class CountsWarning(UserWarning):
    """A count fit or result is computable but doubtful (few sources, low completeness, ...)."""


class CountsFitError(RuntimeError):
    """The count fit did not converge, or its curvature or intervals are not usable."""


# ============================================================================ input helpers
def _check_real(value, name, low=None, high=None, low_open=True, high_open=True):
    """`check_real` with intervals open at the top by default (this module's convention)."""
    return check_real(value, name, low, high, low_open, high_open)


def _check_count(value, name, low):
    if isinstance(value, bool) or not isinstance(value, numbers.Integral) or value < low:
        raise InputError(f"`{name}` must be an integer >= {low}; got {value!r}")
    return int(value)


def _as_counts(counts, name, shape=None):
    """Integer-valued, finite, non-negative counts as an int64 copy, or raise naming ``name``."""
    if isinstance(counts, (str, bytes)):
        raise InputTypeError(f"`{name}` must be numeric counts; got {type(counts).__name__}")
    try:
        array = np.array(counts, dtype=float, copy=True)
    except (TypeError, ValueError) as error:
        raise InputTypeError(
            f"`{name}` must be numeric counts; got {type(counts).__name__}"
        ) from error
    if shape is not None and array.shape != shape:
        raise InputError(f"`{name}` must have shape {shape}; got {array.shape}")
    bad = ~np.isfinite(array) | (array < 0) | (array != np.round(array))
    if bad.any():
        position = tuple(int(i) for i in np.argwhere(bad)[0])
        where = position[0] if len(position) == 1 else position
        raise InputError(
            f"`{name}` must be whole numbers >= 0; got {array[position]} at index {where}"
        )
    return array.astype(np.int64)


def _scalar_out(values, scalar):
    return float(values) if scalar else values


def _power_law_integral(log10_n_start, slope, width):
    """Integral of 10**(log10_n_start + slope x) over x in [0, width] (closed form).

    ``exprel(z) = (e^z - 1) / z`` keeps the flat-slope limit exact.
    """
    return 10.0**log10_n_start * width * special.exprel(slope * _LN10 * width)


#: Below this |z| the derivative of exprel is summed as a series (terms through z^6: the next
#: one, z^7 / (7! 9), is < 2e-14 relative at the threshold), where the closed form would lose
#: digits to cancellation (relative error ~ 2 eps / z^2 ~ 1e-13 at the threshold).
_EXPREL_SERIES_BELOW = 0.05


def _exprel(z):
    """exprel(z) = (e^z - 1) / z; the series 1 + z/2 + z^2/6 + ... (through z^6: the next
    term is < 2e-14 relative) when every |z| is below the threshold, else scipy's."""
    z = np.asarray(z, dtype=float)
    if z.size and np.abs(z).max() < _EXPREL_SERIES_BELOW:
        return 1.0 + z * (1.0 / 2.0 + z * (1.0 / 6.0 + z * (1.0 / 24.0 + z * (
            1.0 / 120.0 + z * (1.0 / 720.0 + z / 5040.0)))))
    return special.exprel(z)


def _exprel_derivative(z):
    """d exprel / dz = int_0^1 v e^(z v) dv = (e^z (z - 1) + 1) / z^2, elementwise.

    The series is sum_n z^n / (n! (n + 2)) (integrate the exponential series term by term).
    """
    z = np.asarray(z, dtype=float)
    # Horner form of the series (the common case: cells of 0.01 mag give |z| ~ 0.01).
    out = 0.5 + z * (1.0 / 3.0 + z * (1.0 / 8.0 + z * (1.0 / 30.0 + z * (
        1.0 / 144.0 + z * (1.0 / 840.0 + z / 5760.0)))))
    large = np.abs(z) >= _EXPREL_SERIES_BELOW
    if large.any():
        zl = z[large]
        with np.errstate(over="ignore", invalid="ignore"):
            out[large] = (np.exp(zl) * (zl - 1.0) + 1.0) / zl**2
    return out


# ============================================================================ count models
@dataclass(frozen=True)
class CountModel:
    """Base class of number-count models n(m) (per deg^2 per mag).

    Subclasses are frozen dataclasses whose fields are the parameters named in
    :attr:`param_names` followed by fixed settings (``reference_mag``, ``m_bright``, ...). They
    implement the private hooks

    ``_log10_density(m)``
        log10 n on a float ndarray (required);
    ``_log10_density_at(values, m)``
        log10 n for a parameter vector ``values`` (:attr:`param_names` order) with this
        model's fixed settings, without building or validating a model: the fit's inner loop
        (default: through :meth:`with_params`);
    ``_log10_density_gradient(values, m)``
        ``(log10 n, d log10 n / d values)``, the gradient of shape (n_params, m.size) (default:
        central differences of ``_log10_density_at``);
    ``_log10_cell_density(values, lo, hi, gradient)``
        log10 of the mean of n over cells [lo, hi] and, with ``gradient``, its gradient; what
        :class:`ForwardModel` integrates (default: the value at the cell centre, the midpoint
        rule; a model with a kink overrides it with the exact cell mean so the likelihood stays
        smooth in the kink's position);
    ``_integral(lo, hi)``
        integral of n over [lo, hi] for 1-D arrays with lo <= hi (default: Gauss-Legendre);
    ``_cumulative_unbounded(m)``
        N(<m) integrated from -infinity, raising :class:`~countscale.errors.InputError` when it
        diverges (required unless every use sets ``m_bright``);
    ``_initial_params(m, log10_n, m_lo, m_hi)``
        a starting parameter dict from rough binned densities (used by :class:`CountsFit`);
    ``_check_params()``
        model-specific validation (called after the generic checks).

    Attributes
    ----------
    name : str
        Model name used in JSON output and run files (``"power_law"``, ...).
    param_names : tuple of str
        Fitted parameters, in the order of :attr:`params` and of a fit's covariance.
    """

    name: ClassVar[str] = ""
    param_names: ClassVar[tuple[str, ...]] = ()
    #: Parameters that are magnitudes; a fit keeps them inside the fit range.
    _location_params: ClassVar[tuple[str, ...]] = ()
    #: Parameter units for Estimates.
    _param_units: ClassVar[Mapping[str, str]] = {}

    def __post_init__(self):
        for field in dataclasses.fields(self):
            value = getattr(self, field.name)
            if field.name == "m_bright":
                if value is not None:
                    object.__setattr__(self, field.name, _check_real(value, "m_bright"))
                continue
            object.__setattr__(self, field.name, _check_real(value, field.name))
        self._check_params()

    def _check_params(self):
        """Model-specific checks; the default has none."""

    # -------------------------------------------------------------- parameters
    @property
    def params(self):
        """Parameter values in :attr:`param_names` order, as a float ndarray."""
        return np.array([getattr(self, name) for name in self.param_names], dtype=float)

    def params_dict(self):
        """``{name: value}`` in :attr:`param_names` order."""
        return {name: float(getattr(self, name)) for name in self.param_names}

    def with_params(self, values):
        """A copy with new parameter values (fixed settings unchanged).

        Parameters
        ----------
        values : mapping of str to float, or sequence of float
            New values by name (a subset is allowed), or all values in :attr:`param_names`
            order.

        Returns
        -------
        CountModel
        """
        if isinstance(values, Mapping):
            unknown = set(values) - set(self.param_names)
            if unknown:
                raise InputError(
                    f"`values` names unknown parameters {sorted(unknown)}; "
                    f"{type(self).__name__} has {list(self.param_names)}"
                )
            changes = {name: float(v) for name, v in values.items()}
        else:
            sequence = np.asarray(values, dtype=float).reshape(-1)
            if sequence.size != len(self.param_names):
                raise InputError(
                    f"`values` must hold {len(self.param_names)} numbers "
                    f"({', '.join(self.param_names)}); got {sequence.size}"
                )
            changes = dict(zip(self.param_names, map(float, sequence), strict=True))
        return dataclasses.replace(self, **changes)

    # -------------------------------------------------------------- public evaluation
    def log10_density(self, m):
        """log10 of the differential counts at magnitudes ``m``.

        Parameters
        ----------
        m : float or array_like of float
            Magnitudes (AB). Not modified.

        Returns
        -------
        float or ndarray
            log10 n(m) with n in deg^-2 mag^-1; same shape as ``m``.
        """
        array, scalar = _as_magnitudes(m)
        return _scalar_out(self._log10_density(array), scalar)

    def density(self, m):
        """Differential counts n(m) in deg^-2 mag^-1 (same shape as ``m``)."""
        array, scalar = _as_magnitudes(m)
        return _scalar_out(10.0 ** self._log10_density(array), scalar)

    def local_slope(self, m):
        """d log10 n / dm at ``m`` (central difference with a 1e-4 mag step)."""
        array, scalar = _as_magnitudes(m)
        step = 1e-4
        slope = (self._log10_density(array + step) - self._log10_density(array - step)) / (
            2.0 * step
        )
        return _scalar_out(slope, scalar)

    def integral(self, m_lo, m_hi):
        """Integral of n(m) over [m_lo, m_hi]: sources per deg^2 in a magnitude range.

        Parameters
        ----------
        m_lo, m_hi : float or array_like of float
            Range ends (AB), broadcast together; ``m_lo <= m_hi``.

        Returns
        -------
        float or ndarray
            Sources per deg^2.
        """
        lo, lo_scalar = _as_magnitudes(m_lo, "m_lo")
        hi, hi_scalar = _as_magnitudes(m_hi, "m_hi")
        lo, hi = np.broadcast_arrays(lo, hi)
        if not (np.all(np.isfinite(lo)) and np.all(np.isfinite(hi))):
            raise InputError("`m_lo` and `m_hi` must be finite magnitudes")
        if np.any(hi < lo):
            position = int(np.flatnonzero((hi < lo).reshape(-1))[0])
            raise InputError(
                f"`m_hi` must be >= `m_lo`; got m_lo = {lo.reshape(-1)[position]}, "
                f"m_hi = {hi.reshape(-1)[position]}"
            )
        values = self._integral(lo.reshape(-1), hi.reshape(-1)).reshape(lo.shape)
        return _scalar_out(values, lo_scalar and hi_scalar)

    def cumulative(self, m):
        """Integral counts N(<m): sources per deg^2 brighter than ``m``.

        With ``m_bright`` set, the integral starts there (N = 0 for m <= m_bright); otherwise it
        starts at -infinity, which converges only when the bright-end slope is > 0.

        Parameters
        ----------
        m : float or array_like of float
            Faint limits (AB).

        Returns
        -------
        float or ndarray
            N(<m) in deg^-2; same shape as ``m``.

        Raises
        ------
        InputError
            When ``m_bright`` is not set and the bright-end slope is <= 0 (N diverges).
        """
        array, scalar = _as_magnitudes(m)
        if not np.all(np.isfinite(array)):
            raise InputError("`m` must be finite magnitudes")
        flat = array.reshape(-1)
        if self.m_bright is None:
            values = self._cumulative_unbounded(flat)
        else:
            start = np.full(flat.shape, self.m_bright)
            values = self._integral(start, np.maximum(flat, self.m_bright))
        return _scalar_out(values.reshape(array.shape), scalar)

    def integral_draws(self, params, m_lo, m_hi, panel_mag=0.1, block=2048):
        """Integral of n(m) over [m_lo, m_hi] for many parameter vectors at once.

        For Monte Carlo draws of a fit's parameters: one vectorised evaluation instead of a
        model per draw. The fixed settings (``reference_mag``, ...) are this model's.

        Parameters
        ----------
        params : array_like, shape (n_draws, n_params)
            Parameter vectors in :attr:`param_names` order.
        m_lo, m_hi : float
            Magnitude range (AB), ``m_lo <= m_hi``.
        panel_mag : float
            Width of the Gauss-Legendre panels (8 nodes each), mag.
        block : int
            Draws evaluated at once (bounds the memory to block x nodes doubles).

        Returns
        -------
        ndarray, shape (n_draws,)
            Sources per deg^2 in the range for each parameter vector.

        Notes
        -----
        Composite 8-point Gauss-Legendre quadrature. A model with a kink (the broken power
        law) loses the quadrature's high order in the one panel holding the kink; with 0.1
        mag panels the relative error stays below 5e-5 for a change of slope up to 1 dex per
        mag (tested against :meth:`integral`), far below the Poisson error of any count.
        """
        theta = np.asarray(params, dtype=float)
        if theta.ndim != 2 or theta.shape[1] != len(self.param_names):
            raise InputError(
                f"`params` must have shape (n_draws, {len(self.param_names)}); got "
                f"{theta.shape}"
            )
        lo = _check_real(m_lo, "m_lo")
        hi = _check_real(m_hi, "m_hi")
        if hi < lo:
            raise InputError(f"`m_hi` must be >= `m_lo`; got m_lo = {lo}, m_hi = {hi}")
        out = np.zeros(theta.shape[0])
        if hi == lo or theta.shape[0] == 0:
            return out
        n_panels = max(1, math.ceil((hi - lo) / _check_real(panel_mag, "panel_mag", 0.0)))
        edges = np.linspace(lo, hi, n_panels + 1)
        half = 0.5 * np.diff(edges)
        nodes = (0.5 * (edges[1:] + edges[:-1]))[:, None] + half[:, None] * _GL_NODES[None, :]
        weights = (half[:, None] * _GL_WEIGHTS[None, :]).ravel()
        nodes = nodes.ravel()
        for start in range(0, theta.shape[0], int(block)):
            part = theta[start:start + int(block)]
            columns = tuple(part.T[:, :, None])
            values = self._log10_density_at(columns, nodes[None, :])
            out[start:start + part.shape[0]] = (10.0 ** values) @ weights
        return out

    # -------------------------------------------------------------- hooks
    def _log10_density(self, m):
        raise NotImplementedError

    def _log10_density_at(self, values, m):
        return self.with_params(values)._log10_density(m)

    def _log10_density_gradient(self, values, m):
        values = np.asarray(values, dtype=float)
        log10_n = self._log10_density_at(values, m)
        gradient = np.empty((values.size, np.size(m)))
        for i in range(values.size):
            # Step ~ cube root of the float epsilon times the scale: the central-difference
            # optimum (truncation ~ h^2, rounding ~ eps / h).
            step = 6e-6 * max(1.0, abs(values[i]))
            up, down = values.copy(), values.copy()
            up[i] += step
            down[i] -= step
            gradient[i] = (self._log10_density_at(up, m) - self._log10_density_at(down, m)) / (
                2.0 * step
            )
        return log10_n, gradient

    def _log10_cell_density(self, values, lo, hi, gradient=False):
        mid = 0.5 * (lo + hi)
        if gradient:
            return self._log10_density_gradient(values, mid)
        return self._log10_density_at(values, mid), None

    def _integral(self, lo, hi):
        """Composite 8-point Gauss-Legendre on panels of at most 0.1 mag."""
        out = np.empty(lo.size)
        for i, (a, b) in enumerate(zip(lo, hi, strict=True)):
            if b == a:
                out[i] = 0.0
                continue
            n_panels = max(1, math.ceil((b - a) / _GL_PANEL_MAG))
            edges = np.linspace(a, b, n_panels + 1)
            half = 0.5 * np.diff(edges)
            mid = 0.5 * (edges[1:] + edges[:-1])
            nodes = mid[:, None] + half[:, None] * _GL_NODES[None, :]
            values = 10.0 ** self._log10_density(nodes)
            out[i] = float(np.sum(half[:, None] * _GL_WEIGHTS[None, :] * values))
        return out

    def _cumulative_unbounded(self, m):
        raise NotImplementedError

    def _initial_params(self, m, log10_n, m_lo, m_hi):
        raise NotImplementedError

    def _diverges(self, slope_name, slope):
        raise InputError(
            f"N(<m) diverges at the bright end: `{slope_name}` must be > 0 when `m_bright` is not "
            f"set; got {slope}"
        )

    def __str__(self):
        values = ", ".join(f"{k}={v:.6g}" for k, v in self.params_dict().items())
        return f"{type(self).__name__}({values}; reference_mag={self.reference_mag:g})"


def _line_fit(m, y):
    """Least-squares intercept and slope of y against m (numpy.polyfit, degree 1)."""
    if m.size < 2 or np.ptp(m) == 0.0:
        return (float(np.mean(y)) if y.size else 0.0), 0.5
    slope, intercept = np.polyfit(m, y, 1)
    return float(intercept), float(slope)


@dataclass(frozen=True)
class PowerLaw(CountModel):
    """Power-law counts ``n(m) = 10^(log10_norm + slope (m - reference_mag))``.

    Parameters
    ----------
    log10_norm : float
        log10 of n at ``reference_mag`` (n in deg^-2 mag^-1).
    slope : float
        d log10 n / dm.
    reference_mag : float
        Magnitude where the normalisation is quoted; pick it near the middle of the data so
        ``log10_norm`` and ``slope`` are nearly uncorrelated.
    m_bright : float, optional
        Bright cutoff for :meth:`cumulative`; by default N(<m) integrates from -infinity,
        which needs ``slope > 0``.

    Notes
    -----
    N(<m) = n(m) / (slope ln 10) for slope > 0 (integrate the exponential). Uniform sources in
    static Euclidean space have slope 0.6 (N(>S) ~ S^-3/2; textbook result).

    Examples
    --------
    >>> law = PowerLaw(log10_norm=3.0, slope=0.5, reference_mag=22.0)
    >>> round(law.density(22.0), 6)
    1000.0
    >>> round(law.cumulative(22.0), 3)  # 1000 / (0.5 ln 10)
    868.589
    """

    log10_norm: float = 0.0
    slope: float = 0.5
    reference_mag: float = 20.0
    m_bright: float | None = None

    name: ClassVar[str] = "power_law"
    param_names: ClassVar[tuple[str, ...]] = ("log10_norm", "slope")
    _param_units: ClassVar[Mapping[str, str]] = {"log10_norm": "dex", "slope": "dex mag^-1"}

    def _log10_density(self, m):
        return self._log10_density_at((self.log10_norm, self.slope), m)

    def _log10_density_at(self, values, m):
        log10_norm, slope = values
        return log10_norm + slope * (m - self.reference_mag)

    def _log10_density_gradient(self, values, m):
        offset = m - self.reference_mag
        return self._log10_density_at(values, m), np.stack([np.ones_like(offset), offset])

    def _integral(self, lo, hi):
        return _power_law_integral(self._log10_density(lo), self.slope, hi - lo)

    def _cumulative_unbounded(self, m):
        if not self.slope > 0.0:
            self._diverges("slope", self.slope)
        return 10.0 ** self._log10_density(m) / (self.slope * _LN10)

    def _initial_params(self, m, log10_n, m_lo, m_hi):
        intercept, slope = _line_fit(m - self.reference_mag, log10_n)
        return {"log10_norm": intercept, "slope": slope}


class _TwoSlopeModel(CountModel):
    """Shared parts of the broken and double power laws (two slopes and a break)."""

    _location_params: ClassVar[tuple[str, ...]] = ("m_break",)
    _param_units: ClassVar[Mapping[str, str]] = {
        "log10_norm": "dex",
        "slope_bright": "dex mag^-1",
        "slope_faint": "dex mag^-1",
        "m_break": "mag",
    }

    def _shape(self, slope_bright, slope_faint, m_break, m):
        """log10 n(m) - log10 n(m_break) for the given shape parameters."""
        raise NotImplementedError

    def _shape_gradient(self, slope_bright, slope_faint, m_break, m):
        """d shape / d (slope_bright, slope_faint, m_break), shape (3, m.size)."""
        raise NotImplementedError

    def _log10_density(self, m):
        return self._log10_density_at(self.params, m)

    def _log10_density_at(self, values, m):
        log10_norm, slope_bright, slope_faint, m_break = values
        reference = np.asarray(self.reference_mag, dtype=float)
        return (log10_norm + self._shape(slope_bright, slope_faint, m_break, m)
                - self._shape(slope_bright, slope_faint, m_break, reference))

    def _log10_density_gradient(self, values, m):
        _, slope_bright, slope_faint, m_break = values
        m = np.asarray(m, dtype=float)
        reference = np.asarray([self.reference_mag], dtype=float)
        shape = self._shape_gradient(slope_bright, slope_faint, m_break, m.reshape(-1))
        at_reference = self._shape_gradient(slope_bright, slope_faint, m_break, reference)
        gradient = np.empty((4, m.size))
        gradient[0] = 1.0
        gradient[1:] = shape - at_reference
        return self._log10_density_at(values, m), gradient.reshape((4, *m.shape))

    def _initial_params(self, m, log10_n, m_lo, m_hi):
        m_break = 0.5 * (m_lo + m_hi)
        bright = m <= m_break
        _, slope_bright = _line_fit(m[bright], log10_n[bright])
        _, slope_faint = _line_fit(m[~bright], log10_n[~bright])
        trial = self.with_params(
            {"log10_norm": 0.0, "slope_bright": slope_bright, "slope_faint": slope_faint,
             "m_break": m_break}
        )
        offset = float(np.mean(log10_n - trial._log10_density(m))) if m.size else 0.0
        return {
            "log10_norm": offset,
            "slope_bright": slope_bright,
            "slope_faint": slope_faint,
            "m_break": m_break,
        }


@dataclass(frozen=True)
class BrokenPowerLaw(_TwoSlopeModel):
    """Two power laws joined continuously at a sharp break.

    ``log10 n(m) = log10_norm + h(m) - h(reference_mag)`` with
    ``h(m) = slope_bright (m - m_break)`` for m < m_break and ``slope_faint (m - m_break)``
    otherwise.

    Parameters
    ----------
    log10_norm : float
        log10 of n at ``reference_mag`` (n in deg^-2 mag^-1), on whichever side of the break
        the reference magnitude lies.
    slope_bright, slope_faint : float
        d log10 n / dm brighter and fainter than the break.
    m_break : float
        Break magnitude (AB).
    reference_mag : float
        Magnitude where the normalisation is quoted.
    m_bright : float, optional
        Bright cutoff for :meth:`cumulative` (otherwise ``slope_bright > 0`` is needed).
    """

    log10_norm: float = 0.0
    slope_bright: float = 0.6
    slope_faint: float = 0.3
    m_break: float = 22.0
    reference_mag: float = 20.0
    m_bright: float | None = None

    name: ClassVar[str] = "broken_power_law"
    param_names: ClassVar[tuple[str, ...]] = (
        "log10_norm",
        "slope_bright",
        "slope_faint",
        "m_break",
    )

    def _shape(self, slope_bright, slope_faint, m_break, m):
        delta = m - m_break
        return np.where(delta < 0.0, slope_bright * delta, slope_faint * delta)

    def _shape_gradient(self, slope_bright, slope_faint, m_break, m):
        delta = m - m_break
        bright = delta < 0.0
        return np.stack([np.where(bright, delta, 0.0), np.where(bright, 0.0, delta),
                         np.where(bright, -slope_bright, -slope_faint)])

    def _log10_cell_density(self, values, lo, hi, gradient=False):
        """Exact mean of n over each cell (closed form on each side of the break).

        With the midpoint rule the likelihood would have a kink in m_break at every cell
        centre (the break crossing a node changes which slope the node follows); the exact
        cell mean is continuously differentiable in m_break, so the fit's Newton steps and
        the covariance's finite differences see a smooth function.
        """
        log10_norm, slope_bright, slope_faint, m_break = values
        reference = self.reference_mag
        reference_bright = reference < m_break
        slope_at_reference = slope_bright if reference_bright else slope_faint
        offset_bright = (reference - m_break) if reference_bright else 0.0
        offset_faint = 0.0 if reference_bright else (reference - m_break)
        width = hi - lo
        start = lo - m_break
        bright = hi <= m_break  # wholly brighter than the break (cells at or past it: faint)
        slope = np.where(bright, slope_bright, slope_faint)
        # y(lo) = log10 n at the cell's bright edge; on a cell wholly on one side the mean is
        # n(lo) exprel(k w) with k = slope ln 10 (integrate the exponential).
        log10_start = log10_norm + slope * start - slope_at_reference * (reference - m_break)
        z = slope * _LN10 * width
        j0 = _exprel(z)
        log10_mean = log10_start + np.log10(j0)
        straddle = np.flatnonzero((lo < m_break) & ~bright)  # the break inside: 0 or 1 cells
        if straddle.size:
            # Split at the break: a bright piece [lo, m_break] and a faint one [m_break, hi].
            w, u_bright = width[straddle], m_break - lo[straddle]
            u_faint = w - u_bright
            rise = 10.0 ** (slope_bright * u_bright)  # n(m_break) / n(lo): continuity
            j0_bright = u_bright * special.exprel(slope_bright * _LN10 * u_bright)
            j0_faint = rise * u_faint * special.exprel(slope_faint * _LN10 * u_faint)
            y_lo = log10_norm + slope_bright * start[straddle] - slope_at_reference * (
                reference - m_break)
            log10_mean[straddle] = y_lo + np.log10((j0_bright + j0_faint) / w)
        if not gradient:
            return log10_mean, None
        # d log10(mean) / d theta = int (d y / d theta) n / int n, with y = log10 n linear on
        # each side: d y / d theta = alpha + beta (m - lo), beta = 1 for the side's own slope;
        # int (m - lo) n / int n = w exprel'(z) / exprel(z) on a one-sided cell.
        lever = width * _exprel_derivative(z) / j0
        grad = np.empty((4, lo.size))
        grad[0] = 1.0
        grad[1] = np.where(bright, start - offset_bright + lever, -offset_bright)
        grad[2] = np.where(bright, -offset_faint, start - offset_faint + lever)
        grad[3] = slope_at_reference - slope
        if straddle.size:
            j1_bright = u_bright**2 * _exprel_derivative(slope_bright * _LN10 * u_bright)
            j1_faint = rise * u_faint**2 * _exprel_derivative(slope_faint * _LN10 * u_faint)
            total = j0_bright + j0_faint
            s = start[straddle]
            grad[1, straddle] = ((s - offset_bright) * j0_bright + j1_bright
                                 - offset_bright * j0_faint) / total
            grad[2, straddle] = (-offset_faint * j0_faint + j1_faint
                                 - offset_faint * j0_bright) / total
            grad[3, straddle] = (slope_at_reference
                                 - (slope_bright * j0_bright + slope_faint * j0_faint) / total)
        return log10_mean, grad

    def _integral(self, lo, hi):
        # Closed form on each side of the break (power-law integrals).
        bright_hi = np.minimum(hi, self.m_break)
        faint_lo = np.maximum(lo, self.m_break)
        bright_width = np.maximum(bright_hi - lo, 0.0)
        faint_width = np.maximum(hi - faint_lo, 0.0)
        bright = _power_law_integral(self._log10_density(lo), self.slope_bright, bright_width)
        faint = _power_law_integral(self._log10_density(faint_lo), self.slope_faint, faint_width)
        return bright + faint

    def _cumulative_unbounded(self, m):
        if not self.slope_bright > 0.0:
            self._diverges("slope_bright", self.slope_bright)
        m_bright_side = np.minimum(m, self.m_break)
        tail = 10.0 ** self._log10_density(m_bright_side) / (self.slope_bright * _LN10)
        return tail + self._integral(m_bright_side, m)


@dataclass(frozen=True)
class DoublePowerLaw(_TwoSlopeModel):
    """Two power laws joined by a smooth transition of width ``transition_mag``.

    ``log10 n(m) = log10_norm + h(m) - h(reference_mag)`` with, for x = m - m_break,
    ``h(m) = slope_bright x + (slope_faint - slope_bright) t log10(1 + 10^(x / t))``.

    Parameters
    ----------
    log10_norm : float
        log10 of n at ``reference_mag`` (n in deg^-2 mag^-1).
    slope_bright, slope_faint : float
        Asymptotic d log10 n / dm far brighter and far fainter than the break.
    m_break : float
        Centre of the transition (AB); there the local slope is the mean of the two slopes.
    transition_mag : float
        Transition width t in mag (fixed, not fitted); > 0. As t -> 0 the model tends to
        :class:`BrokenPowerLaw` (log10 n differs by at most (slope difference) t log10 2).
    reference_mag : float
        Magnitude where the normalisation is quoted.
    m_bright : float, optional
        Bright cutoff for :meth:`cumulative` (otherwise ``slope_bright > 0`` is needed).

    Notes
    -----
    The "softplus" join works for a flattening (slope_faint < slope_bright) and a steepening
    alike. With ``t = 1 / (slope_bright - slope_faint)`` it equals the familiar form
    ``n = n_b / [10^(-a x) + 10^(-b x)]`` (a = slope_bright > b = slope_faint): expand
    ``-log10(10^(-a x) + 10^(-b x)) = a x - log10(1 + 10^((a - b) x))``. That form can only
    flatten and ties the transition width to the slopes, which is why it is not the default.
    """

    log10_norm: float = 0.0
    slope_bright: float = 0.6
    slope_faint: float = 0.3
    m_break: float = 22.0
    transition_mag: float = 0.5
    reference_mag: float = 20.0
    m_bright: float | None = None

    name: ClassVar[str] = "double_power_law"
    param_names: ClassVar[tuple[str, ...]] = (
        "log10_norm",
        "slope_bright",
        "slope_faint",
        "m_break",
    )

    def _check_params(self):
        if self.transition_mag <= 0.0:
            raise InputError(f"`transition_mag` must be > 0; got {self.transition_mag}")

    def _shape(self, slope_bright, slope_faint, m_break, m):
        x = m - m_break
        t = self.transition_mag
        # log10(1 + 10^u) = logaddexp(0, u ln10) / ln10, stable for any u.
        softplus = np.logaddexp(0.0, x / t * _LN10) / _LN10
        return slope_bright * x + (slope_faint - slope_bright) * t * softplus

    def _shape_gradient(self, slope_bright, slope_faint, m_break, m):
        x = m - m_break
        t = self.transition_mag
        softplus = np.logaddexp(0.0, x / t * _LN10) / _LN10
        # d softplus(u) / du = 10^u / (1 + 10^u) = expit(u ln 10).
        step = special.expit(x / t * _LN10)
        return np.stack([x - t * softplus, t * softplus,
                         -slope_bright - (slope_faint - slope_bright) * step])

    def _cumulative_unbounded(self, m):
        if not self.slope_bright > 0.0:
            self._diverges("slope_bright", self.slope_bright)
        # Far brighter than the break the model is a pure power law (to 1e-40 in log10 n):
        # integrate that tail in closed form and the rest numerically.
        start = np.minimum(m, self.m_break - _TAIL_TRANSITIONS * self.transition_mag)
        tail = 10.0 ** self._log10_density(start) / (self.slope_bright * _LN10)
        return tail + self._integral(start, m)


_MODELS_BY_NAME = {cls.name: cls for cls in (PowerLaw, BrokenPowerLaw, DoublePowerLaw)}


# ============================================================================ Poisson helpers
def poisson_interval(n_observed, level=0.68):
    """Exact (Garwood) central confidence interval for a Poisson mean.

    Parameters
    ----------
    n_observed : int or array_like of int
        Observed counts, >= 0.
    level : float
        Confidence level in (0, 1); 0.68 by default.

    Returns
    -------
    tuple of ndarray (or floats for scalar input)
        ``(lo, hi)`` bounds on the Poisson mean.

    Notes
    -----
    Garwood 1936, Biometrika 28, 437; as tabulated for astronomy by Gehrels 1986, ApJ 303, 336
    (from memory): ``lo = chi2.ppf(a/2, 2n) / 2`` (0 for n = 0) and
    ``hi = chi2.ppf(1 - a/2, 2n + 2) / 2`` with a = 1 - level. Equivalently, the Poisson
    probability of >= n at ``lo`` and of <= n at ``hi`` are both a/2.
    """
    level = _check_real(level, "level", 0.0, 1.0)
    scalar = np.ndim(n_observed) == 0
    counts = _as_counts(n_observed, "n_observed").astype(float)
    tail = 0.5 * (1.0 - level)
    with np.errstate(invalid="ignore"):
        lo = np.where(counts > 0, 0.5 * stats.chi2.ppf(tail, 2.0 * counts), 0.0)
    hi = 0.5 * stats.chi2.ppf(1.0 - tail, 2.0 * counts + 2.0)
    if scalar:
        return float(lo), float(hi)
    return lo, hi


def _deviance(mu, counts):
    """Poisson deviance 2 sum[N ln(N / mu) - (N - mu)] (McCullagh & Nelder 1989, sec. 2.3)."""
    return 2.0 * _half_deviance(mu, counts)


def _half_deviance(mu, counts, positive=None):
    """Half the Poisson deviance, sum[N ln(N / mu) - (N - mu)], to full relative precision.

    Written as ``N (q - ln(1 + q))`` with ``q = mu / N - 1`` (and ``mu`` where N = 0): near the
    optimum each term is ~q^2 N / 2 and is computed without the cancellation of terms ~N ln N
    in the direct form (whose rounding, ~1e-10 for 10^5 sources per bin, stalls an optimiser).
    """
    if positive is None:
        positive = counts > 0
    with np.errstate(divide="ignore", invalid="ignore"):
        n, m = counts[positive], mu[positive]
        q = (m - n) / n
        return float(np.sum(n * (q - np.log1p(q)))) + float(np.sum(mu[~positive]))


def jackknife_covariance(delete_one_values):
    """Delete-one jackknife covariance of a statistic.

    Parameters
    ----------
    delete_one_values : array_like of float, shape (K,) or (K, p)
        The statistic (scalar or p-vector) recomputed with each of K regions left out; K >= 2.

    Returns
    -------
    ndarray of float, shape (p, p) (or a float for 1-D input)
        ``(K - 1) / K * sum_k (x_k - mean)(x_k - mean)^T``.

    Notes
    -----
    Quenouille 1956, Biometrika 43, 353; Tukey 1958 (the variance estimator); Efron & Stein
    1981, Ann. Statist. 9, 586 (from memory). For the mean of K values it equals the familiar
    s^2 / K.
    """
    values = np.array(delete_one_values, dtype=float, copy=True)
    scalar = values.ndim == 1
    if scalar:
        values = values[:, None]
    if values.ndim != 2 or values.shape[0] < 2:
        raise InputError(
            f"`delete_one_values` must have shape (K,) or (K, p) with K >= 2; got {values.shape}"
        )
    if not np.all(np.isfinite(values)):
        raise InputError("`delete_one_values` must be finite")
    k = values.shape[0]
    centred = values - values.mean(axis=0)
    covariance = (k - 1.0) / k * centred.T @ centred
    return float(covariance[0, 0]) if scalar else covariance


def combine_covariances(cov_poisson, cov_jackknife):
    """Poisson covariance plus the (positive part of the) clustering excess.

    Parameters
    ----------
    cov_poisson : array_like, shape (p, p)
        Covariance from the Poisson likelihood (inverse Hessian).
    cov_jackknife : array_like, shape (p, p)
        Jackknife covariance over footprint regions (Poisson and clustering together).

    Returns
    -------
    ndarray, shape (p, p)
        ``C_P + PSD(C_J - C_P)``, where PSD keeps the non-negative eigen-directions.

    Notes
    -----
    The jackknife estimates the total variance (Poisson and clustering), but with K regions it
    is itself uncertain (relative scatter of a variance ~ sqrt(2 / (K - 1))) and can fall below
    the Poisson variance, which is a floor: clustering can only add variance to counts
    (Poisson plus a positive sample-variance term; e.g. Trenti & Stiavelli 2008, ApJ 676,
    767). So the clustering excess ``C_J - C_P`` is kept only along the
    directions where it is positive. In one dimension this is ``max(var_P, var_J)``.
    """
    c_p = np.array(cov_poisson, dtype=float, copy=True)
    c_j = np.array(cov_jackknife, dtype=float, copy=True)
    if c_p.ndim != 2 or c_p.shape[0] != c_p.shape[1] or c_j.shape != c_p.shape:
        raise InputError(
            f"`cov_poisson` and `cov_jackknife` must be square and of one shape; got "
            f"{c_p.shape} and {c_j.shape}"
        )
    excess = 0.5 * ((c_j - c_p) + (c_j - c_p).T)
    eigenvalues, vectors = np.linalg.eigh(excess)
    positive = (vectors * np.clip(eigenvalues, 0.0, None)) @ vectors.T
    return c_p + positive


# ============================================================================ forward model
#: Largest extension (mag) of the true-magnitude grid beyond the outer bin edges.
_MAX_EXTENSION_MAG = 6.0
#: Probe step (mag) when searching for the extension.
_EXTENSION_PROBE_MAG = 0.02
#: Effective area below this fraction of its maximum in the bins counts as "no detections".
#: Beyond it the detected in-scatter is < 1e-9 of a bin's content for count slopes below
#: ~1 mag^-1 over the 6 mag cap (10^(6 slope) * 1e-12 < 1e-6; judgement call, no source).
_NEGLIGIBLE_AREA_FRACTION = 1e-12


def _gaussian_cell_integral(x):
    """G(x) = x Phi(x) + phi(x), an antiderivative of the standard normal CDF."""
    return x * special.ndtr(x) + np.exp(-0.5 * x * x) / math.sqrt(2.0 * math.pi)


def _as_magnitude_function(value, name, grid_probe):
    """A callable m -> float ndarray from a callable or a constant; None stays None."""
    if value is None:
        return None
    if callable(value):
        function = value
    elif isinstance(value, numbers.Real) and not isinstance(value, bool):
        constant = float(value)
        if not math.isfinite(constant):
            raise InputError(f"`{name}` must be finite; got {constant}")

        def function(m, constant=constant):
            return np.full(np.shape(m), constant)
    else:
        raise InputTypeError(
            f"`{name}` must be a number or a callable of true magnitude; got "
            f"{type(value).__name__}"
        )
    _evaluate(function, grid_probe, name)
    return function


def _evaluate(function, m, name):
    """Evaluate ``function`` at ``m``; check a finite, non-negative array of m's shape."""
    try:
        values = np.asarray(function(np.array(m, dtype=float, copy=True)), dtype=float)
    except (TypeError, ValueError) as error:
        raise InputTypeError(
            f"`{name}` must map an array of magnitudes to numbers; calling it failed: {error}"
        ) from error
    if values.shape != np.shape(m):
        values = np.broadcast_to(values, np.shape(m)).astype(float)
    bad = ~np.isfinite(values) | (values < 0.0)
    if bad.any():
        position = int(np.flatnonzero(bad.reshape(-1))[0])
        raise InputError(
            f"`{name}` must be finite and >= 0; got {values.reshape(-1)[position]} at "
            f"{np.asarray(m).reshape(-1)[position]:.4f} mag"
        )
    return values


class ForwardModel:
    """Expected observed counts per magnitude bin for a count model.

    Parameters
    ----------
    bin_edges_mag : array_like of float, shape (n_bins + 1,)
        Edges of the observed-magnitude bins (AB); strictly increasing.
    effective_area_deg2 : float or callable
        A_eff(m_true) in deg^2: a constant (a complete survey of that area), or a vectorised
        callable of true magnitude such as ``lambda m: area * completeness(m)`` or
        ``lambda m: completeness.effective_area_deg2(m, coverage, depth)``.
    scatter_mag : float or callable, optional
        Gaussian photometric scatter sigma(m_true) in mag (a constant or a vectorised callable);
        None or 0 for none.
    grid_step_mag : float
        Largest cell of the true-magnitude integration grid, in mag; 0.01 by default.
    area_deg2 : float, optional
        Geometric footprint area in deg^2, the reference for completeness ``A_eff / area`` and
        for raw densities. Default: the largest effective area on the grid (right when the
        completeness plateau is 1).
    scatter_reach : float
        How many sigma beyond the outer bin edges the true-magnitude grid reaches; 5 by default.
    true_mag_limits : tuple of float, optional
        Explicit (bright, faint) limits of the true-magnitude grid, overriding the automatic
        extension.

    Attributes
    ----------
    bin_edges_mag : ndarray, shape (n_bins + 1,)
    n_bins : int
    grid_mag, grid_width_mag : ndarray, shape (n_grid,)
        Centres and widths of the true-magnitude cells.
    effective_area_grid_deg2, scatter_grid_mag : ndarray, shape (n_grid,)
        A_eff and sigma at the cell centres.
    kernel : ndarray, shape (n_bins, n_grid)
        ``K[i, j]``: integral over cell j of P(m_obs in bin i | m_true), in mag.
    area_deg2 : float

    Notes
    -----
    The expected observed count in bin i is

    ``mu_i = int dm n(m; theta) A_eff(m) int_{bin i} N(m_obs; m, sigma(m)) dm_obs``,

    the intrinsic counts times the effective area, convolved with the scatter and integrated
    over the bin (the Eddington 1913, MNRAS 73, 359 problem, forward-modelled). It is evaluated
    as ``mu = (K * A_eff) @ n`` on cells of at most ``grid_step_mag``, taking A_eff at the
    cell centre, n as its mean over the cell (the centre value for smooth models; the exact
    cell mean for :class:`BrokenPowerLaw`, whose kink would otherwise make mu jump in slope
    whenever the break crosses a cell centre), and integrating the Gaussian bin probability
    over each cell exactly:
    ``int_a^b [Phi((e - m)/s)] dm = s [G((e - a)/s) - G((e - b)/s)]`` with
    ``G(x) = x Phi(x) + phi(x)``. Without scatter K is the overlap of cell and bin. Cells tile
    each bin exactly, so the only approximation is the midpoint rule for A_eff and (smooth
    models) n (relative error ~ (step slope ln10)^2 / 24 ~ 1e-5 at the defaults).

    Sources scatter into the bins from outside them, so the true-magnitude grid extends beyond
    the outer bin edges: on each side up to where a source is more than ``scatter_reach`` sigma
    from the nearest edge, or (on the faint side) where A_eff has fallen below 1e-12 of its
    largest value in the bins, whichever is nearer, and never more than 6 mag (a
    :class:`CountsWarning` says so if that cap binds). The count model is extrapolated over the
    extension. Detection is taken to depend on the true magnitude only (as an injection-
    recovery completeness measures it), independently of the measurement error.
    """

    def __init__(
        self,
        bin_edges_mag,
        effective_area_deg2,
        scatter_mag=None,
        grid_step_mag=0.01,
        area_deg2=None,
        scatter_reach=5.0,
        true_mag_limits=None,
    ):
        edges = self._edges_iv(bin_edges_mag)
        step = _check_real(grid_step_mag, "grid_step_mag", 0.0, 0.5, high_open=False)
        reach = _check_real(scatter_reach, "scatter_reach", 0.0, 20.0, high_open=False)
        probe = np.linspace(edges[0], edges[-1], 257)
        area_fn = _as_magnitude_function(effective_area_deg2, "effective_area_deg2", probe)
        if area_fn is None:
            raise InputTypeError("`effective_area_deg2` must be a number or a callable; got None")
        scatter_fn = _as_magnitude_function(scatter_mag, "scatter_mag", probe)
        self._area_fn = area_fn
        self._scatter_fn = scatter_fn

        # Cells inside the bins: each bin split evenly into cells of at most `step`.
        inner = [
            np.linspace(lo, hi, max(1, math.ceil((hi - lo) / step - 1e-9)) + 1)[:-1]
            for lo, hi in itertools.pairwise(edges)
        ]
        inner_lo = np.concatenate(inner)
        inner_hi = np.r_[inner_lo[1:], edges[-1]]
        inner_mid = 0.5 * (inner_lo + inner_hi)
        inner_area = _evaluate(area_fn, inner_mid, "effective_area_deg2")
        if not np.any(inner_area > 0.0):
            raise InputError(
                "`effective_area_deg2` must be > 0 somewhere in the bins; got 0 over "
                f"[{edges[0]:g}, {edges[-1]:g}] mag"
            )
        if true_mag_limits is not None:
            bright, faint = self._limits_iv(true_mag_limits, edges)
        elif scatter_fn is None:
            bright, faint = edges[0], edges[-1]
        else:
            bright, faint = self._extension(edges, reach, float(inner_area.max()))
        n_bright = math.ceil((edges[0] - bright) / step - 1e-9)
        n_faint = math.ceil((faint - edges[-1]) / step - 1e-9)
        bright_lo = np.linspace(bright, edges[0], n_bright + 1)[:-1] if n_bright else []
        faint_lo = np.linspace(edges[-1], faint, n_faint + 1)[:-1] if n_faint else []
        cell_lo = np.concatenate([np.asarray(bright_lo, float), inner_lo, faint_lo])
        cell_hi = np.r_[cell_lo[1:], faint if n_faint else edges[-1]]
        mid = 0.5 * (cell_lo + cell_hi)
        area_grid = _evaluate(area_fn, mid, "effective_area_deg2")
        if scatter_fn is None:
            sigma = np.zeros(mid.size)
        else:
            sigma = _evaluate(scatter_fn, mid, "scatter_mag")

        if area_deg2 is None:
            reference_area = float(area_grid.max())
        else:
            reference_area = _check_real(area_deg2, "area_deg2", 0.0)
            largest = float(area_grid.max())
            if largest > reference_area * (1.0 + 1e-9):
                raise InputError(
                    f"`effective_area_deg2` must not exceed `area_deg2` ({reference_area:g} "
                    f"deg^2); got {largest:g} deg^2 (completeness above 1)"
                )

        self.bin_edges_mag = _read_only(edges)
        self.n_bins = int(edges.size - 1)
        self.grid_mag = _read_only(mid)
        self.grid_width_mag = _read_only(cell_hi - cell_lo)
        self.effective_area_grid_deg2 = _read_only(area_grid)
        self.scatter_grid_mag = _read_only(sigma)
        self.area_deg2 = reference_area
        self.grid_step_mag = step
        self.scatter_reach = reach
        self.kernel = _read_only(self._kernel(edges, cell_lo, cell_hi, sigma))
        self._response = _read_only(self.kernel * area_grid[None, :])
        self._cell_lo = _read_only(cell_lo)
        self._cell_hi = _read_only(cell_hi)
        self._bin_of_cell = np.searchsorted(edges, mid, side="right") - 1

    # -------------------------------------------------------------- construction helpers
    @staticmethod
    def _edges_iv(bin_edges_mag):
        edges, _ = _as_magnitudes(bin_edges_mag, "bin_edges_mag")
        if edges.ndim != 1 or edges.size < 2:
            raise InputError(
                f"`bin_edges_mag` must be a 1-D array of at least 2 edges; got shape {edges.shape}"
            )
        if not np.all(np.isfinite(edges)):
            raise InputError("`bin_edges_mag` must be finite magnitudes")
        steps = np.diff(edges)
        if np.any(steps <= 0.0):
            position = int(np.flatnonzero(steps <= 0.0)[0])
            raise InputError(
                f"`bin_edges_mag` must be strictly increasing; got {edges[position]:g} then "
                f"{edges[position + 1]:g} at index {position}"
            )
        return edges

    @staticmethod
    def _limits_iv(limits, edges):
        try:
            bright, faint = limits
        except (TypeError, ValueError) as error:
            raise InputTypeError(
                f"`true_mag_limits` must be a pair (bright, faint); got {limits!r}"
            ) from error
        bright = _check_real(bright, "true_mag_limits[0]")
        faint = _check_real(faint, "true_mag_limits[1]")
        if bright > edges[0] or faint < edges[-1]:
            raise InputError(
                f"`true_mag_limits` must contain the bins [{edges[0]:g}, {edges[-1]:g}]; "
                f"got ({bright:g}, {faint:g})"
            )
        return bright, faint

    def _extension(self, edges, reach, largest_area):
        """(bright, faint) true-magnitude limits of the grid (see the class Notes)."""
        offsets = np.arange(1, round(_MAX_EXTENSION_MAG / _EXTENSION_PROBE_MAG) + 1)
        offsets = offsets * _EXTENSION_PROBE_MAG
        limits = []
        for edge, direction in ((edges[0], -1.0), (edges[-1], 1.0)):
            m = edge + direction * offsets
            sigma = _evaluate(self._scatter_fn, m, "scatter_mag")
            reaches = reach * sigma >= offsets
            if direction > 0:
                area = _evaluate(self._area_fn, m, "effective_area_deg2")
                reaches &= area > _NEGLIGIBLE_AREA_FRACTION * largest_area
            if reaches[-1]:
                side = "faint" if direction > 0 else "bright"
                warnings.warn(
                    f"sources {_MAX_EXTENSION_MAG:g} mag beyond the {side} bin edge {edge:g} can "
                    f"still scatter into the bins (sigma = {sigma[-1]:.3g} mag there); the "
                    "true-magnitude grid is cut there (give `true_mag_limits` to choose)",
                    CountsWarning,
                    stacklevel=3,
                )
                extension = _MAX_EXTENSION_MAG
            elif reaches.any():
                extension = float(offsets[np.flatnonzero(reaches)[-1]]) + _EXTENSION_PROBE_MAG
            else:
                extension = reach * float(sigma[0]) if sigma[0] > 0 else 0.0
                extension = min(max(extension, 0.0), _EXTENSION_PROBE_MAG)
            limits.append(edge + direction * extension)
        return limits[0], limits[1]

    @staticmethod
    def _kernel(edges, cell_lo, cell_hi, sigma):
        n_bins = edges.size - 1
        kernel = np.empty((n_bins, cell_lo.size))
        sharp = sigma <= 1e-9
        # Exact cell/bin overlap where there is no scatter.
        overlap = np.clip(
            np.minimum(cell_hi[None, :], edges[1:, None])
            - np.maximum(cell_lo[None, :], edges[:-1, None]),
            0.0,
            None,
        )
        kernel[:, sharp] = overlap[:, sharp]
        soft = ~sharp
        if soft.any():
            s = sigma[soft]
            a = cell_lo[soft]
            b = cell_hi[soft]
            # W[k, j] = integral over cell j of Phi((e_k - m) / s_j) dm for every edge e_k.
            w = s[None, :] * (
                _gaussian_cell_integral((edges[:, None] - a[None, :]) / s[None, :])
                - _gaussian_cell_integral((edges[:, None] - b[None, :]) / s[None, :])
            )
            kernel[:, soft] = np.clip(w[1:] - w[:-1], 0.0, None)
        return kernel

    # -------------------------------------------------------------- evaluation
    def _response_for(self, area_grid):
        return self.kernel * area_grid[None, :]

    def _cell_density(self, model):
        """Mean intrinsic n over each true-magnitude cell (deg^-2 mag^-1), shape (n_grid,)."""
        log10_n, _ = model._log10_cell_density(model.params, self._cell_lo, self._cell_hi)
        return 10.0**log10_n

    def expected_counts(self, model):
        """Expected observed counts per bin, mu_i.

        Parameters
        ----------
        model : CountModel
            Intrinsic counts.

        Returns
        -------
        ndarray of float, shape (n_bins,)
        """
        if not isinstance(model, CountModel):
            raise InputTypeError(f"`model` must be a CountModel; got {type(model).__name__}")
        return self._response @ self._cell_density(model)

    def intrinsic_counts_per_deg2(self, model):
        """Integral of the intrinsic n(m) over each bin (true magnitudes), per deg^2."""
        if not isinstance(model, CountModel):
            raise InputTypeError(f"`model` must be a CountModel; got {type(model).__name__}")
        return model.integral(self.bin_edges_mag[:-1], self.bin_edges_mag[1:])

    def bin_effective_area_deg2(self):
        """Mean A_eff over each bin (true magnitudes, no scatter), deg^2; shape (n_bins,)."""
        inside = (self._bin_of_cell >= 0) & (self._bin_of_cell < self.n_bins)
        weighted = np.bincount(
            self._bin_of_cell[inside],
            weights=(self.effective_area_grid_deg2 * self.grid_width_mag)[inside],
            minlength=self.n_bins,
        )
        return weighted / np.diff(self.bin_edges_mag)

    def bin_completeness(self):
        """Mean completeness ``A_eff / area_deg2`` over each bin; shape (n_bins,)."""
        return self.bin_effective_area_deg2() / self.area_deg2

    def region_area_grids(self, region_effective_area_deg2):
        """Per-region A_eff on the grid, shape (K, n_grid), checked to add up to A_eff.

        Parameters
        ----------
        region_effective_area_deg2 : sequence of float or of callables, length K
            Numbers are region areas (deg^2): region k then has the share a_k / sum(a) of
            A_eff at every magnitude (uniform depth). Callables are each region's own A_eff(m);
            they must add up to the forward model's A_eff.
        """
        if isinstance(region_effective_area_deg2, (str, bytes)) or not isinstance(
            region_effective_area_deg2, (Sequence, np.ndarray)
        ):
            raise InputTypeError(
                "`region_effective_area_deg2` must be a sequence of areas or callables; got "
                f"{type(region_effective_area_deg2).__name__}"
            )
        items = list(region_effective_area_deg2)
        if all(callable(item) for item in items):
            grids = np.array(
                [
                    _evaluate(item, self.grid_mag, f"region_effective_area_deg2[{k}]")
                    for k, item in enumerate(items)
                ]
            )
            total = grids.sum(axis=0)
            scale = max(float(self.effective_area_grid_deg2.max()), 1e-300)
            mismatch = float(np.max(np.abs(total - self.effective_area_grid_deg2))) / scale
            if mismatch > 1e-6:
                raise InputError(
                    "`region_effective_area_deg2` must add up to `effective_area_deg2`; they "
                    f"differ by up to {mismatch:.3g} of the largest effective area"
                )
            return grids
        areas = np.array(
            [_check_real(item, f"region_effective_area_deg2[{k}]", 0.0)
             for k, item in enumerate(items)]
        )
        shares = areas / areas.sum()
        return shares[:, None] * self.effective_area_grid_deg2[None, :]

    def __repr__(self):
        scatter = "none" if not np.any(self.scatter_grid_mag > 0) else (
            f"{self.scatter_grid_mag.min():.3g}-{self.scatter_grid_mag.max():.3g} mag"
        )
        return (
            f"ForwardModel({self.n_bins} bins {self.bin_edges_mag[0]:g}-"
            f"{self.bin_edges_mag[-1]:g} mag, true grid {self.grid_mag[0]:.3f}-"
            f"{self.grid_mag[-1]:.3f} mag in {self.grid_mag.size} cells, scatter {scatter}, "
            f"area {self.area_deg2:.6g} deg^2)"
        )


# ============================================================================ fitting
#: Newton iterations allowed per fit before it reports non-convergence.
_NEWTON_MAX_ITERATIONS = 100
#: Convergence: the Newton decrement g^T F^-1 g (F the Fisher information) below this. It is
#: the squared distance to the optimum in units of the statistical errors, so 1e-10 puts the
#: parameters within ~1e-5 sigma of the maximum and ln L within ~5e-11 of it.
_NEWTON_TOLERANCE = 1e-10
#: When no step along the Newton direction lowers -ln L any more (float rounding of -ln L is
#: ~1e-13 with the half-deviance form), a decrement below this is accepted (~1e-3 sigma).
_NEWTON_NOISE_TOLERANCE = 1e-6
#: Below this Fisher decrement (within ~1 sigma of the optimum) the steps use the observed
#: information (the Hessian of -ln L from forward differences of the analytic gradient) when it
#: is positive definite. The Fisher information leaves out sum (mu - N) d^2 mu, which is not
#: small for a weakly constrained break (a sharp break moves mu by ~n(m_break) times the slope
#: change); Fisher steps alone then overshoot and converge only linearly.
_OBSERVED_BELOW = 1.0
#: Forward-difference step for the observed information, in units of each parameter's Fisher
#: sigma: far above the gradient's rounding, far below the scale on which the Hessian varies.
_OBSERVED_STEP_SIGMA = 1e-3
#: Refits of perturbed data (jackknife, bootstrap) start from each local maximum of the full
#: fit within this much ln L of the best, at most this many. Rough scale: perturbing the data
#: moves the ln L difference dlnL of two maxima by ~sqrt(2 dlnL) for a Poisson redraw and
#: ~sqrt(2 dlnL / K) for leaving out one of K regions, so maxima 5 below the best are rarely
#: promoted by a redraw and practically never by a delete-one sample (judgement call).
_REFIT_START_DELTA_LOGLIKE = 5.0
_REFIT_MAX_STARTS = 4
#: Armijo sufficient-decrease constant and number of step halvings in the line search
#: (Nocedal & Wright 2006, Numerical Optimization, 2nd ed., sec. 3.1; from memory).
_ARMIJO = 1e-4
_MAX_HALVINGS = 30
#: A search is abandoned as stalled when, for ``_STALL_ITERATIONS`` steps in a row, -ln L fell
#: by less than ``_STALL_RATIO`` of the decrease its quadratic model promised (half the Newton
#: decrement; a healthy Newton step realises most of it) or by less than ``_STALL_DROP``,
#: without converging: the search is creeping along a flat, degenerate valley (e.g. a break
#: within a bin of the range's end, where one slope and the break trade off). A healthy search
#: takes at most a step or two that small before converging (near the end the decrement
#: falls tenfold per step, or the curvature is recomputed). A fit from the data then relies on
#: its other starts; a refit from the full fit's maxima on the others or on the search.
_STALL_RATIO = 1e-3
_STALL_DROP = 1e-9
_STALL_ITERATIONS = 5


def _newton_step(gradient, fisher):
    """Newton step -F^-1 g and decrement g^T F^-1 g, damping F when it is not positive."""
    size = gradient.size
    scale = float(np.max(np.abs(np.diag(fisher)))) if size else 0.0
    if not (scale > 0.0 and math.isfinite(scale)):
        return None, math.inf
    damping = 0.0
    for _ in range(12):
        step = _solve_positive(fisher + damping * scale * np.eye(size), -gradient)
        if step is not None:
            return step, float(-gradient @ step)
        # Levenberg damping towards steepest descent (Nocedal & Wright 2006, sec. 10.3).
        damping = 1e-12 if damping == 0.0 else 100.0 * damping
    return None, math.inf


def _bfgs_update(hessian, step, change):
    """BFGS update of a Hessian approximation from a step and the gradient's change.

    Keeps the matrix positive definite when ``step . change > 0`` and leaves it alone
    otherwise (Nocedal & Wright 2006, Numerical Optimization, 2nd ed., eq. 6.19; from memory).
    """
    curvature = float(step @ change)
    pushed = hessian @ step
    along = float(step @ pushed)
    if not (curvature > 0.0 and along > 0.0):
        return hessian
    return hessian + np.outer(change, change) / curvature - np.outer(pushed, pushed) / along


def _solve_positive(matrix, vector):
    """``matrix^-1 vector`` for a well-conditioned positive-definite matrix, else None."""
    try:
        factor = linalg.cho_factor(matrix)
    except linalg.LinAlgError:
        return None
    # Reciprocal condition number from the Cholesky diagonal: below ~1e-14 the solution
    # carries no correct digits (double precision).
    diagonal = np.abs(np.diag(factor[0]))
    if not (np.all(np.isfinite(factor[0])) and diagonal.min() > 1e-7 * diagonal.max()):
        return None
    return linalg.cho_solve(factor, vector)


class _Likelihood:
    """Poisson likelihood of binned counts under ``mu = response @ n(cells; theta)``.

    Works on parameter vectors (:attr:`names` order) through the model's
    ``_log10_cell_density`` hook, so no model object is built or validated in the optimiser's
    loop. The normalisation enters mu linearly, so for free shape parameters its
    maximum-likelihood value is closed-form (sum mu = sum N, "profiled"); the other parameters
    are found by Newton's method on the half deviance with analytic gradients: the Fisher
    information as curvature far from the optimum, the observed information (then BFGS-
    updated) near it, and a backtracking line search. Location parameters (m_break) are kept
    inside ``location_range``; ``fit_range`` holds the outer edges of the fitted bins.

    ``background`` (per fitted bin, optional) is a known count added to mu: the stars of a
    star catalogue of the same survey among the sources, ``mu = response @ n + background``.
    Then the normalisation has no closed form and Newton's method moves it with the rest.
    An all-zero background is no background (the likelihood is the plain one, bit for bit).
    """

    def __init__(self, template, cell_lo, cell_hi, response, counts, fit_range,
                 location_range, background=None):
        # Cells that cannot reach a fitted bin do not change mu: drop them once.
        reach = np.any(response > 0.0, axis=0)
        self.template = template
        self.names = template.param_names
        self.cell_lo = cell_lo[reach]
        self.cell_hi = cell_hi[reach]
        self.response = np.ascontiguousarray(response[:, reach])
        self.fit_range = fit_range
        self.location_range = location_range
        self._norm = self.names.index("log10_norm") if "log10_norm" in self.names else None
        self._lower = np.array([location_range[0] if n in template._location_params else -np.inf
                                for n in self.names])
        self._upper = np.array([location_range[1] if n in template._location_params else np.inf
                                for n in self.names])
        if background is not None:
            background = np.asarray(background, dtype=float)
            if not np.any(background > 0.0):
                background = None
        self.background = background
        self._set_counts(counts)

    def _set_counts(self, counts):
        self.counts = np.asarray(counts, dtype=float)
        self.total = float(self.counts.sum())
        self._positive = self.counts > 0
        self._all_positive = bool(self._positive.all())
        #: ln L of the saturated model (mu = N): ln L = saturated - half deviance.
        self.saturated = float(np.sum(special.xlogy(self.counts, self.counts) - self.counts
                                      - special.gammaln(self.counts + 1.0)))

    def with_counts(self, counts):
        """The same likelihood for other counts in the same bins (a bootstrap redraw)."""
        other = object.__new__(_Likelihood)
        other.__dict__.update(self.__dict__)
        other._set_counts(counts)
        return other

    # -------------------------------------------------------------- evaluation
    def _evaluate(self, theta, free, profile, gradient):
        """Half deviance (and its gradient and Fisher information over ``free``) at ``theta``.

        Returns ``(f, g, F, theta_full)``; with ``profile`` the normalisation in ``theta`` is
        ignored and ``theta_full`` carries its closed-form best value. ``f`` is inf where mu is
        not finite or vanishes in a bin with sources.
        """
        work = np.array(theta, dtype=float)
        if profile:
            work[self._norm] = 0.0
        failed = (math.inf, None, None, work)
        with np.errstate(over="ignore", under="ignore", invalid="ignore", divide="ignore"):
            log10_n, log10_gradient = self.template._log10_cell_density(
                work, self.cell_lo, self.cell_hi, gradient
            )
            # The maximum is NaN or +inf if any value is (np.max propagates NaN); -inf is a
            # zero density, which is allowed.
            shift = float(np.max(log10_n))
            if not math.isfinite(shift):
                return failed
            density = np.exp((log10_n - shift) * _LN10)
            shape = self.response @ density
            if profile:
                total_shape = float(np.sum(shape))
                if not (total_shape > 0.0 and math.isfinite(total_shape)):
                    return failed
                scale = self.total / total_shape
                work[self._norm] = math.log10(scale) - shift if scale > 0.0 else -math.inf
            else:
                scale = 10.0**shift
            mu = shape * scale
            if self.background is not None:
                mu = mu + self.background
            if not math.isfinite(float(mu.sum())):
                return failed
            if self._all_positive:
                # The common case: no empty bin, so no masks (this loop is the fit's hot path).
                if mu.min() <= 0.0:
                    return failed
                q = mu / self.counts - 1.0
                f = float(self.counts @ (q - np.log1p(q)))
            else:
                if np.any(mu[self._positive] <= 0.0):
                    return failed
                f = _half_deviance(mu, self.counts, self._positive)
            if not gradient or not math.isfinite(f):
                return f, None, None, work
            # d mu_i / d theta_k = ln10 [response @ (n d log10 n / d theta_k)]_i; with a = d ln
            # mu / d theta: gradient sum (mu - N) a, Fisher information sum mu a a^T (for the
            # profiled case the multinomial one, with a centred by d ln sum(shape)).
            d_shape = (log10_gradient[free] * density) @ self.response.T
            d_shape = d_shape.T * _LN10
            if self.background is not None:
                # Not profiled (see maximise): d mu / d theta = scale d_shape.
                a = d_shape * (scale / mu[:, None])
            elif shape.min() > 0.0:
                a = d_shape / shape[:, None]
            else:
                live = shape > 0.0
                a = np.where(live[:, None], d_shape / np.where(live, shape, 1.0)[:, None], 0.0)
            if profile:
                a = a - d_shape.sum(axis=0) / total_shape
            g = (mu - self.counts) @ a
            fisher = (a * mu[:, None]).T @ a
        if not math.isfinite(float(fisher.sum()) + float(g.sum())):
            return failed
        return f, g, fisher, work

    def expected(self, theta):
        """mu per fitted bin at a full parameter vector (background included)."""
        log10_n, _ = self.template._log10_cell_density(np.asarray(theta, dtype=float),
                                                       self.cell_lo, self.cell_hi, False)
        mu = self.response @ 10.0**log10_n
        return mu if self.background is None else mu + self.background

    def _observed_information(self, theta, free, profile, gradient, fisher):
        """Hessian of the half deviance over ``free``: forward differences of the gradient.

        Forward differences (relative error ~ the step, 1e-3 sigma) are ample for a Newton
        matrix and cost one gradient per parameter.
        """
        steps = _OBSERVED_STEP_SIGMA / np.sqrt(np.diag(fisher))
        hessian = np.empty((free.size, free.size))
        for k in range(free.size):
            up = theta.copy()
            up[free[k]] += steps[k]
            g_up = self._evaluate(up, free, profile, True)[1]
            if g_up is None:
                return None
            hessian[:, k] = (g_up - gradient) / steps[k]
        return 0.5 * (hessian + hessian.T)

    def half_deviance(self, theta):
        """Half the deviance at a full parameter vector (normalisation included)."""
        return self._evaluate(theta, np.empty(0, dtype=int), False, False)[0]

    def loglike(self, theta):
        """Poisson ln L (including -ln N!) at a full parameter vector; -inf where undefined."""
        f = self.half_deviance(theta)
        return self.saturated - f if math.isfinite(f) else -math.inf

    def deviance(self, theta):
        return 2.0 * self.half_deviance(theta)

    # -------------------------------------------------------------- optimisation
    def _newton(self, theta, free, profile):
        """Minimise the half deviance over ``free`` from ``theta``.

        Returns ``(theta_full, f, problem)`` with ``problem`` None on convergence, else a
        reason.
        """
        theta = np.array(theta, dtype=float)
        lower, upper = self._lower[free], self._upper[free]
        theta[free] = np.clip(theta[free], lower, upper)
        f, g, fisher, full = self._evaluate(theta, free, profile, True)
        if not math.isfinite(f):
            return full, f, "no finite likelihood at the starting parameters"
        if free.size == 0:
            return full, f, None
        observed = None  # observed information, computed near the optimum and then reused
        previous = math.inf  # the last decrement
        creeping = 0  # consecutive steps that lowered -ln L too little (see _STALL_RATIO)
        for _ in range(_NEWTON_MAX_ITERATIONS):
            x = theta[free]
            # Parameters on a bound that the gradient pushes outwards stay there this step.
            move = ~(((x <= lower) & (g > 0.0)) | ((x >= upper) & (g < 0.0)))
            while True:
                if not move.any():
                    return full, f, None
                curvature = fisher[np.ix_(move, move)]
                step_move, decrement = _newton_step(g[move], curvature)
                if step_move is None:
                    return full, f, "the Fisher information is not finite and positive"
                fresh = observed is None and decrement < _OBSERVED_BELOW
                if fresh:
                    observed = self._observed_information(theta, free, profile, g, fisher)
                if observed is not None:
                    # Reused while the search ends (the curvature barely changes over the
                    # last ~1 sigma), so convergence stays fast without recomputing it; but
                    # recomputed here if the last step cut the decrement by less than 10 (the
                    # iterate has moved to where the old curvature no longer fits).
                    observed_step = _solve_positive(observed[np.ix_(move, move)], -g[move])
                    if not fresh and observed_step is not None and (
                        float(-g[move] @ observed_step) > 0.1 * previous
                    ):
                        observed = self._observed_information(theta, free, profile, g, fisher)
                        observed_step = (None if observed is None else _solve_positive(
                            observed[np.ix_(move, move)], -g[move]))
                    if observed_step is None:
                        observed = None  # not a local bowl (yet): Fisher steps for now
                    else:
                        step_move = observed_step
                        decrement = float(-g[move] @ step_move)
                step = np.zeros(x.size)
                step[move] = step_move
                outward = ((x <= lower) & (step < 0.0)) | ((x >= upper) & (step > 0.0))
                if not outward.any():
                    break
                move &= ~outward
            if decrement <= _NEWTON_TOLERANCE:
                return full, f, None
            if creeping >= _STALL_ITERATIONS:
                return full, f, (f"stalled: {_STALL_ITERATIONS} steps in a row lowered -ln L by "
                                 f"under {_STALL_RATIO:g} of the predicted decrease (Newton "
                                 f"decrement {decrement:.3g})")
            previous = decrement
            with np.errstate(divide="ignore", invalid="ignore"):
                room = np.where(step > 0.0, (upper - x) / step,
                                np.where(step < 0.0, (lower - x) / step, np.inf))
            t = min(1.0, float(np.min(room)))
            for halving in range(_MAX_HALVINGS):
                trial = theta.copy()
                trial[free] = np.clip(x + t * step, lower, upper)
                # The full step is usually accepted: evaluate it with its gradient at once.
                evaluated = self._evaluate(trial, free, profile, halving == 0)
                if evaluated[0] <= f - _ARMIJO * t * decrement:
                    break
                t *= 0.5
            else:
                if decrement <= _NEWTON_NOISE_TOLERANCE:
                    return full, f, None
                return full, f, (f"no step lowers -ln L although the Newton decrement is "
                                 f"{decrement:.3g}")
            theta = trial
            if evaluated[1] is None:
                evaluated = self._evaluate(theta, free, profile, True)
            g_old, f_old = g, f
            f, g, fisher, full = evaluated
            drop = f_old - f
            creeping = creeping + 1 if (drop < _STALL_RATIO * 0.5 * decrement
                                        or drop < _STALL_DROP) else 0
            if observed is not None:
                observed = _bfgs_update(observed, theta[free] - x, g - g_old)
        return full, f, f"no convergence in {_NEWTON_MAX_ITERATIONS} Newton iterations"

    def maximise(self, start, fixed=None):
        """Maximise over the parameters not in ``fixed``; returns (theta, loglike).

        Parameters
        ----------
        start : dict
            Starting values for every parameter (the normalisation's is not used while it is
            free: it is profiled in closed form).
        fixed : dict, optional
            Parameters held at given values.

        Raises
        ------
        CountsFitError
            When the optimiser does not converge.
        """
        fixed = dict(fixed or {})
        theta = np.array([fixed.get(n, start[n]) for n in self.names], dtype=float)
        # With a background the normalisation has no closed form: it is not profiled.
        profile = (self._norm is not None and "log10_norm" not in fixed
                   and self.background is None)
        free = np.array([i for i, n in enumerate(self.names)
                         if n not in fixed and not (profile and i == self._norm)], dtype=int)
        theta, f, problem = self._newton(theta, free, profile)
        if problem is not None:
            raise CountsFitError(f"the count fit did not converge: {problem}")
        return theta, self.saturated - f


def _model_template(model, fit_lo, fit_hi):
    if isinstance(model, CountModel):
        return model
    if isinstance(model, str):
        if model not in _MODELS_BY_NAME:
            raise InputError(
                f"`model` must be one of {', '.join(map(repr, _MODELS_BY_NAME))} or a "
                f"CountModel; got {model!r}"
            )
        # A reference magnitude near the middle of the data decorrelates norm and slope.
        reference = 0.5 * round(fit_lo + fit_hi)
        cls = _MODELS_BY_NAME[model]
        defaults = {"reference_mag": reference}
        if "m_break" in cls.param_names:
            defaults["m_break"] = 0.5 * (fit_lo + fit_hi)
        return cls(**defaults)
    raise InputTypeError(
        f"`model` must be a model name or a CountModel; got {type(model).__name__}"
    )


class CountsFit:
    """Fit a count model to binned counts through a forward model (scikit-learn style).

    Parameters
    ----------
    model : CountModel or {"power_law", "broken_power_law", "double_power_law"}
        A model instance as template (its fixed settings ``reference_mag``, ``m_bright``,
        ``transition_mag`` are kept; its parameter values are not used) or a name (then
        ``reference_mag`` is the middle of the fit range rounded to 0.5 mag).
    forward : ForwardModel
        Bins, effective area and scatter.
    fit_range_mag : tuple of float, optional
        (bright, faint) observed magnitudes; the bins lying wholly inside are fitted. Default:
        all bins.
    n_bootstrap : int
        Parametric-bootstrap draws for the goodness-of-fit p-value; 0 skips it
        (``p_value_`` is then None).

    Attributes
    ----------
    model_ : CountModel
        The fitted model.
    params_ : dict of str to float
        Maximum-likelihood parameters.
    cov_ : ndarray, shape (n_params, n_params)
        Reported covariance (``param_names`` order): ``cov_poisson_`` alone, or combined with
        the jackknife by :func:`combine_covariances` when regions are given.
    cov_poisson_ : ndarray
        Inverse Hessian of -ln L (central differences).
    cov_stars_ : ndarray, shape (n_params, n_params)
        The subtracted stars' Poisson noise carried to the parameters,
        ``J diag(S) J^T`` with J = ``star_jacobian_``; zeros without stars.
    star_jacobian_ : ndarray, shape (n_params, n_bins)
        d parameters / d (stars in each bin) at the fit; zeros outside the fit range and
        without stars.
    star_counts_, region_star_counts_ : ndarray or None
        The star counts given to :meth:`fit` (None without).
    n_stars_ : int
        Stars in the fit range (0 without star counts).
    cov_jackknife_ : ndarray or None
        Delete-one jackknife covariance over regions.
    jackknife_params_ : ndarray, shape (K, n_params), or None
        Parameters refitted with each region left out.
    estimates_ : dict of str to Estimate
        One normal Estimate per parameter from ``cov_`` with its Poisson/clustering budget.
    loglike_ : float
        Poisson log-likelihood (including -ln N!) at the fit.
    deviance_ : float
        Poisson deviance; ``dof_`` = fitted bins - parameters.
    p_value_ : float or None
        Parametric-bootstrap p-value of the deviance.
    p_value_error_ : float or None
        Its Monte Carlo standard error ``sqrt(p (1 - p) / B)`` from B draws. When no redraw is
        as bad as the data, p = 1 / (B + 1) only bounds the p-value from above.
    p_value_is_bound_ : bool or None
        True when no redraw was as bad as the data, so ``p_value_`` = 1 / (B + 1) is an upper
        bound ("p < 0.005" for B = 200), not an estimate; None without a bootstrap.
    aic_, bic_ : float
        ``2 k - 2 ln L`` and ``k ln(n_bins) - 2 ln L``.
    n_sources_, n_bins_, n_regions_ : int
        Sources and bins in the fit; regions in the jackknife (0 without).
    expected_counts_ : ndarray, shape (n_bins,)
        Expected observed counts in every bin of the forward model at the fit.
    used_bins_ : ndarray of bool, shape (n_bins,)
        Bins inside the fit range.

    Notes
    -----
    Maximises ``ln L = sum_i [N_i ln mu_i - mu_i - ln N_i!]`` over the fitted bins (Cash 1979,
    ApJ 228, 939, for binned Poisson data), with mu from :class:`ForwardModel`. The normalisation
    is profiled in closed form (sum mu = sum N at the optimum) and the shape parameters found by
    Newton's method with analytic gradients through the linear forward model: Fisher-scoring
    steps far from the optimum, the observed information (finite differences of the gradient,
    then BFGS-updated) within ~1 sigma of it, a backtracking line search, to a Newton decrement
    of 1e-10 (within ~1e-5 sigma of the maximum). Two-slope models first scan m_break at every
    bin edge and centre with the other parameters refitted, then free it from each position
    and keep the best of the local maxima reached; m_break is kept at least two bins inside
    the fit range (nearer an end the slope on the short side rests on one bin and trades off
    with the break: a ridge, not a maximum), with a :class:`CountsWarning` when it ends on that
    limit. Jackknife and bootstrap refits start from each of the full fit's local maxima within
    5 in ln L of the best (with sharp bins and little scatter the likelihood in m_break has
    several, about a bin apart) and take the best; only if none converges do they search from
    the data. The Poisson covariance is the inverse of the central-difference Hessian of -ln L
    in the natural parameters (steps refined to a tenth of the first-pass sigma).

    Clustering makes counts in cells over-dispersed, so with ``region_counts`` (K footprint
    regions) every parameter is refitted with each region left out; the delete-one jackknife
    covariance captures Poisson and clustering variance together. The reported covariance is
    ``C_P + PSD(C_J - C_P)`` (:func:`combine_covariances`): the jackknife where it exceeds the
    Poisson floor, never less than the floor, which protects against a noisy jackknife from few
    regions. Each Estimate's budget gives the Poisson share ``var_P / var`` and the clustering
    share (``"cosmic_variance"``) of its variance; for any smooth function of one parameter,
    the shares of the variance of log10 are the same ratios (delta method). With regions, the
    Estimates' intervals use Student-t quantiles with the Welch-Satterthwaite degrees of
    freedom of the jackknife-based variance (K - 1 when clustering dominates): a variance from
    K regions is itself uncertain, and normal quantiles would under-cover (about 66 % instead
    of 68 % for K = 16).

    Stars among the sources (``star_counts``, from a star catalogue of the same survey over
    the same footprint): the expected count per bin is ``mu_i = galaxies_i(theta) + S_i``,
    the galaxy model through completeness and scatter plus the star catalogue's count S_i,
    which is already an observed count (same survey, same selection), so it needs no
    forward model. S_i enters the likelihood as a known additive component; its Poisson
    noise is added by propagation: with ``J = d theta / d S`` at the fit (implicit-function
    theorem on the likelihood's gradient, ``_star_jacobian``), ``cov_stars_ = J diag(S) J^T``
    joins the Poisson floor (``C_P + C_S + PSD(C_J - C_P - C_S)`` with regions) and gets its
    own budget share, ``"stars"``. We propagate rather than marginalise over the star
    expectation per bin: the counts are large enough in the bins where stars matter for the
    linear propagation to hold, it keeps the fit's speed and its closed-form parts, and
    treats the star catalogue as a Poisson sample of the stars expected among the sources.
    When the star catalogue lists the very stars of the catalogue (so sources - stars is
    exactly the galaxies), both the likelihood's variance (galaxies + stars) and the added
    term overstate the error: conservative. The fitted model, N(<m) and the corrected
    differential counts are then of galaxies alone. An all-zero ``star_counts`` gives the same
    fit as none.

    Goodness of fit: the deviance ``D = 2 sum[N ln(N / mu) - (N - mu)]`` and its
    parametric-bootstrap p-value ``(1 + #{D* >= D}) / (1 + B)`` from B Poisson redraws of the
    fitted mu, each refitted (Davison & Hinkley 1997, Bootstrap Methods, sec. 4.2; from memory).
    Under clustering the deviance exceeds its Poisson expectation; a small p-value with regions
    signals the over-dispersion that the jackknife accounts for. Model comparison: AIC (Akaike
    1974, IEEE TAC 19, 716) and BIC (Schwarz 1978, Ann. Statist. 6, 461) with n = fitted bins.
    """

    def __init__(self, model="power_law", forward=None, fit_range_mag=None, n_bootstrap=200):
        self.model = model
        self.forward = forward
        self.fit_range_mag = fit_range_mag
        self.n_bootstrap = n_bootstrap

    # -------------------------------------------------------------- validation
    def _fit_iv(self, observed_counts, region_counts, region_effective_area_deg2,
                star_counts=None, region_star_counts=None):
        forward = self.forward
        if not isinstance(forward, ForwardModel):
            raise InputTypeError(
                f"`forward` must be a ForwardModel; got {type(forward).__name__}"
            )
        n_bootstrap = _check_count(self.n_bootstrap, "n_bootstrap", 0)
        edges = forward.bin_edges_mag
        if self.fit_range_mag is None:
            used = np.ones(forward.n_bins, dtype=bool)
        else:
            try:
                lo, hi = self.fit_range_mag
            except (TypeError, ValueError) as error:
                raise InputTypeError(
                    f"`fit_range_mag` must be a pair (bright, faint); got {self.fit_range_mag!r}"
                ) from error
            lo = _check_real(lo, "fit_range_mag[0]")
            hi = _check_real(hi, "fit_range_mag[1]")
            if lo >= hi:
                raise InputError(f"`fit_range_mag` must have bright < faint; got ({lo}, {hi})")
            slack = 1e-9 * max(1.0, abs(edges[0]), abs(edges[-1]))
            if lo < edges[0] - slack or hi > edges[-1] + slack:
                raise InputError(
                    f"`fit_range_mag` must lie within the binned magnitudes [{edges[0]:g}, "
                    f"{edges[-1]:g}]; got ({lo:g}, {hi:g})"
                )
            used = (edges[:-1] >= lo - slack) & (edges[1:] <= hi + slack)
            if not used.any():
                raise InputError(
                    f"`fit_range_mag` ({lo:g}, {hi:g}) contains no whole bin of `bin_edges_mag`"
                )
        counts = _as_counts(observed_counts, "observed_counts", (forward.n_bins,))
        regions = None
        region_grids = None
        if region_counts is not None:
            regions = _as_counts(region_counts, "region_counts")
            if regions.ndim != 2 or regions.shape[1] != forward.n_bins:
                raise InputError(
                    f"`region_counts` must have shape (K, {forward.n_bins}); got {regions.shape}"
                )
            if regions.shape[0] < 3:
                raise InputError(
                    f"`region_counts` must have at least 3 regions for a jackknife; got "
                    f"{regions.shape[0]}"
                )
            if not np.array_equal(regions.sum(axis=0), counts):
                raise InputError(
                    "`region_counts` must add up to `observed_counts` in every bin; they differ "
                    f"in {int(np.count_nonzero(regions.sum(axis=0) != counts))} bins"
                )
            if region_effective_area_deg2 is None:
                raise InputError(
                    "`region_effective_area_deg2` is needed with `region_counts` (the areas or "
                    "effective-area callables of the K regions)"
                )
            region_grids = forward.region_area_grids(region_effective_area_deg2)
            if region_grids.shape[0] != regions.shape[0]:
                raise InputError(
                    f"`region_effective_area_deg2` must have one entry per region "
                    f"({regions.shape[0]}); got {region_grids.shape[0]}"
                )
        elif region_effective_area_deg2 is not None:
            raise InputError("`region_effective_area_deg2` was given without `region_counts`")
        stars, region_stars = self._stars_iv(star_counts, region_star_counts, counts, regions)
        return counts, used, n_bootstrap, regions, region_grids, stars, region_stars

    def _stars_iv(self, star_counts, region_star_counts, counts, regions):
        """Star counts per bin (and per region) of a star catalogue of the same footprint."""
        if star_counts is None:
            if region_star_counts is not None:
                raise InputError("`region_star_counts` was given without `star_counts`")
            return None, None
        stars = _as_counts(star_counts, "star_counts", counts.shape)
        if regions is None:
            if region_star_counts is not None:
                raise InputError("`region_star_counts` was given without `region_counts`")
            return stars, None
        if region_star_counts is None:
            if stars.any():
                raise InputError(
                    "`region_star_counts` is needed with `region_counts` and `star_counts` (the "
                    "jackknife leaves each region's stars out with its sources)"
                )
            return stars, np.zeros_like(regions)
        region_stars = _as_counts(region_star_counts, "region_star_counts", regions.shape)
        if not np.array_equal(region_stars.sum(axis=0), stars):
            raise InputError(
                "`region_star_counts` must add up to `star_counts` in every bin; they differ in "
                f"{int(np.count_nonzero(region_stars.sum(axis=0) != stars))} bins"
            )
        return stars, region_stars

    # -------------------------------------------------------------- fit
    def fit(self, observed_counts, rng=None, region_counts=None, region_effective_area_deg2=None,
            progress=None, star_counts=None, region_star_counts=None):
        """Fit the model.

        Parameters
        ----------
        observed_counts : array_like of int, shape (n_bins,)
            Sources per observed-magnitude bin of ``forward``. Not modified.
        rng : int or numpy.random.Generator, optional
            For the parametric bootstrap.
        region_counts : array_like of int, shape (K, n_bins), optional
            The same counts split over K >= 3 footprint regions (adding up to
            ``observed_counts``), for the jackknife.
        region_effective_area_deg2 : sequence, length K, optional
            Region areas in deg^2 (uniform depth) or per-region A_eff callables; see
            :meth:`ForwardModel.region_area_grids`. Required with ``region_counts``.
        progress : callable, optional
            Called with 1 after each refit (one per jackknife region and per bootstrap
            redraw: K + ``n_bootstrap`` calls), e.g. a progress bar's ``update``.
        star_counts : array_like of int, shape (n_bins,), optional
            Stars per observed-magnitude bin from a star catalogue of the same survey over the
            same footprint: the observed counts are then modelled as galaxies + stars, and the
            fitted model is of the galaxies (see the class Notes).
        region_star_counts : array_like of int, shape (K, n_bins), optional
            The star counts split over the same K regions (adding up to ``star_counts``);
            required with ``region_counts`` when there are stars.

        Returns
        -------
        CountsFit
            ``self``, fitted.

        Raises
        ------
        InputError
            Bad bins, counts or ranges; too few sources or bins for the model's parameters;
            sources in a bin with zero effective area; star counts that leave no galaxies in
            the fit range (as many stars as sources or more).

        Warns
        -----
        CountsWarning
            Fewer than :data:`MIN_SOURCES` sources (galaxies, with star counts); bins with
            completeness < 0.5 in the fit; fitted bins with more stars than sources (possible
            by chance when the star catalogue is a separate sample, but a sign that the two
            catalogues differ in footprint, band or depth when it lists the very stars).
        """
        counts, used, n_bootstrap, regions, region_grids, stars, region_stars = self._fit_iv(
            observed_counts, region_counts, region_effective_area_deg2, star_counts,
            region_star_counts
        )
        if progress is not None and not callable(progress):
            raise InputTypeError(f"`progress` must be callable or None; got {progress!r}")
        tick = progress if progress is not None else _no_progress
        generator = _as_generator(rng)
        forward = self.forward
        edges = forward.bin_edges_mag
        fit_lo = float(edges[:-1][used][0])
        fit_hi = float(edges[1:][used][-1])
        template = _model_template(self.model, fit_lo, fit_hi)
        n_params = len(template.param_names)
        used_counts = counts[used]
        n_sources = int(used_counts.sum())
        n_bins = int(used.sum())
        n_stars = 0 if stars is None else int(stars[used].sum())
        if stars is not None:
            self._check_stars(counts, stars, used, edges, fit_lo, fit_hi, n_params)
        if n_sources <= n_params:
            raise InputError(
                f"`observed_counts` has {n_sources} sources in the fit range [{fit_lo:g}, "
                f"{fit_hi:g}] mag; too few to fit the {n_params} parameters of {template.name}"
            )
        if n_bins <= n_params:
            raise InputError(
                f"the fit range [{fit_lo:g}, {fit_hi:g}] mag holds {n_bins} bins; "
                f"{template.name} needs more than {n_params}"
            )
        bin_area = forward.bin_effective_area_deg2()
        response = forward._response[used]
        dead = (response.sum(axis=1) <= 0.0) & (used_counts > 0)
        if dead.any():
            i = int(np.flatnonzero(used)[np.flatnonzero(dead)[0]])
            raise InputError(
                f"`observed_counts` has {counts[i]} sources in bin [{edges[i]:g}, "
                f"{edges[i + 1]:g}] mag where the expected count is 0 (zero effective area)"
            )
        if n_sources - n_stars < MIN_SOURCES:
            warnings.warn(
                f"only {n_sources - n_stars} "
                + ("sources" if stars is None else f"galaxies ({n_sources} sources - {n_stars} "
                   "stars)")
                + f" in the fit range [{fit_lo:g}, {fit_hi:g}] mag "
                f"(fewer than {MIN_SOURCES}); the fit and its errors are unreliable",
                CountsWarning,
                stacklevel=2,
            )
        completeness = forward.bin_completeness()
        low = used & (completeness < LOW_COMPLETENESS)
        if low.any():
            i = int(np.flatnonzero(low)[0])
            warnings.warn(
                f"{int(low.sum())} fitted bins have mean completeness below "
                f"{LOW_COMPLETENESS:g} (from [{edges[i]:g}, {edges[i + 1]:g}] mag, "
                f"{completeness[i]:.3g}); the fit leans on the completeness model there",
                CountsWarning,
                stacklevel=2,
            )

        used_edges = edges[np.r_[np.flatnonzero(used), np.flatnonzero(used)[-1] + 1]]
        # A break is kept two bins inside the range: nearer an end, the slope on the short
        # side rests on one bin, trades off exactly with the break, and the likelihood has a
        # ridge instead of a maximum (the model is not identifiable there).
        break_range = (float(used_edges[min(2, n_bins // 2)]),
                       float(used_edges[max(-3, -1 - n_bins // 2)]))
        background = None if stars is None else stars[used].astype(float)
        likelihood = _Likelihood(template, forward._cell_lo, forward._cell_hi, response,
                                 used_counts, (fit_lo, fit_hi), break_range, background)
        # The data start reads galaxies: sources less stars (clipped at 0).
        start_counts = counts if stars is None else np.clip(counts - stars, 0, None)
        theta, loglike, maxima = self._maximise_from_data(likelihood, start_counts, bin_area)
        self._warn_at_range_edge(template, theta, (fit_lo, fit_hi), break_range)
        cov_poisson = self._poisson_covariance(likelihood, theta, template)
        star_jacobian = np.zeros((n_params, forward.n_bins))
        if likelihood.background is not None:
            star_jacobian[:, used] = self._star_jacobian(likelihood, theta, cov_poisson)
        cov_stars = (star_jacobian * (0.0 if stars is None else stars)) @ star_jacobian.T
        cov_stars = 0.5 * (cov_stars + cov_stars.T)
        floor = cov_poisson + cov_stars

        cov_jackknife = None
        jackknife_params = None
        if regions is not None:
            jackknife_params = self._jackknife(likelihood, regions, region_grids, used, maxima,
                                               tick, region_stars)
            cov_jackknife = jackknife_covariance(jackknife_params)
            cov = combine_covariances(floor, cov_jackknife)
        else:
            cov = floor

        model = template.with_params(theta)
        expected_all = forward.expected_counts(model)
        if stars is not None:
            expected_all = expected_all + stars
        mu = expected_all[used]
        deviance = _deviance(mu, used_counts.astype(float))
        p_value = None
        p_value_error = None
        p_value_is_bound = None
        if n_bootstrap:
            n_exceed = self._bootstrap_exceedances(likelihood, maxima, mu, deviance, n_bootstrap,
                                                   generator, bin_area, tick)
            p_value = (1.0 + n_exceed) / (1.0 + n_bootstrap)
            p_value_is_bound = n_exceed == 0
            # Binomial standard error of a Monte Carlo p-value from B draws (Davison & Hinkley
            # 1997, sec. 4.2.5; from memory).
            p_value_error = math.sqrt(p_value * (1.0 - p_value) / n_bootstrap)

        self.model_ = model
        self.params_ = model.params_dict()
        self.cov_ = cov
        self.cov_poisson_ = cov_poisson
        self.cov_stars_ = cov_stars
        self.star_jacobian_ = _read_only(star_jacobian)
        self.star_counts_ = None if stars is None else _read_only(stars, dtype=np.int64)
        self.region_star_counts_ = (None if region_stars is None
                                    else _read_only(region_stars, dtype=np.int64))
        self.n_stars_ = n_stars
        self.cov_jackknife_ = cov_jackknife
        self.jackknife_params_ = jackknife_params
        self.loglike_ = float(loglike)
        self.deviance_ = deviance
        self.dof_ = n_bins - n_params
        self.p_value_ = p_value
        self.p_value_error_ = p_value_error
        self.p_value_is_bound_ = p_value_is_bound
        self.aic_ = 2.0 * n_params - 2.0 * loglike
        self.bic_ = n_params * math.log(n_bins) - 2.0 * loglike
        self.n_sources_ = n_sources
        self.n_bins_ = n_bins
        self.n_regions_ = 0 if regions is None else int(regions.shape[0])
        self.expected_counts_ = _read_only(expected_all)
        self.used_bins_ = _read_only(used, dtype=bool)
        self.fit_range_ = (fit_lo, fit_hi)
        self.observed_counts_ = _read_only(counts, dtype=np.int64)
        self.region_counts_ = None if regions is None else _read_only(regions, dtype=np.int64)
        self.region_area_grids_ = None if region_grids is None else _read_only(region_grids)
        self.estimates_ = self._estimates(model, cov_poisson, cov, cov_jackknife,
                                          None if stars is None else cov_stars)
        self._likelihood = likelihood
        self._maxima = maxima
        self._profiles = {}
        return self

    @staticmethod
    def _check_stars(counts, stars, used, edges, fit_lo, fit_hi, n_params):
        """Star counts must leave galaxies to fit; a bin with more stars than sources warns."""
        n_sources, n_stars = int(counts[used].sum()), int(stars[used].sum())
        if n_sources - n_stars <= n_params:
            raise InputError(
                f"`star_counts` must leave more galaxies than the {n_params} parameters in the "
                f"fit range [{fit_lo:g}, {fit_hi:g}] mag (stars are subtracted from the "
                f"sources); got {n_stars} stars against {n_sources} sources"
            )
        over = np.flatnonzero(used & (stars > counts))
        if over.size:
            i = int(over[np.argmax((stars - counts)[over])])
            warnings.warn(
                f"`star_counts` exceed the sources in {over.size} fitted bin(s), most in "
                f"[{edges[i]:g}, {edges[i + 1]:g}] mag ({int(stars[i])} stars, {int(counts[i])} "
                "sources): the galaxy model is pushed towards 0 there; by chance if the star "
                "catalogue is a separate sample, otherwise it does not match the catalogue's "
                "footprint, band or depth",
                CountsWarning,
                stacklevel=3,
            )

    @staticmethod
    def _star_jacobian(likelihood, theta, cov_poisson):
        """d theta / d (stars per fitted bin) at the fit, shape (n_params, n_fitted_bins).

        The fit solves g(theta, b) = 0, g the gradient of the half deviance
        sum [mu - N ln mu] with mu = galaxies(theta) + b; by the implicit-function theorem
        d theta / d b_i = -H^-1 d g / d b_i with d g / d b_i = (N_i / mu_i^2) d mu_i / d theta
        and H^-1 the Poisson covariance. d mu / d theta by central differences (steps of a
        tenth of each Poisson sigma).
        """
        theta = np.asarray(theta, dtype=float)
        steps = np.maximum(0.1 * np.sqrt(np.diag(cov_poisson)), 1e-7)
        d_mu = np.empty((theta.size, likelihood.counts.size))
        for k, h in enumerate(steps):
            up, down = theta.copy(), theta.copy()
            up[k] += h
            down[k] -= h
            d_mu[k] = (likelihood.expected(up) - likelihood.expected(down)) / (2.0 * h)
        mu = likelihood.expected(theta)
        return -cov_poisson @ (d_mu * (likelihood.counts / mu**2))

    def refit(self, forward):
        """Maximum-likelihood parameters of the same counts through another forward model.

        For small changes of the forward model (a completeness curve moved within its
        errors): the bins, counts, fit range and model are this fit's, and the search starts
        from this fit's local maxima, so it is much faster than a new :meth:`fit`. Nothing
        else is computed (no covariance, jackknife or p-value).

        Parameters
        ----------
        forward : ForwardModel
            With the same bin edges as this fit's.

        Returns
        -------
        ndarray, shape (n_params,)
            The parameters in ``param_names`` order.
        """
        self._fitted("model_")
        if not isinstance(forward, ForwardModel):
            raise InputTypeError(f"`forward` must be a ForwardModel; got {type(forward).__name__}")
        if not np.array_equal(forward.bin_edges_mag, self.forward.bin_edges_mag):
            raise InputError("`forward` must have this fit's bin edges")
        used = self.used_bins_
        counts = self.observed_counts_
        old = self._likelihood
        likelihood = _Likelihood(old.template, forward._cell_lo, forward._cell_hi,
                                 forward._response[used], counts[used], old.fit_range,
                                 old.location_range, old.background)
        if self.star_counts_ is not None:
            counts = np.clip(counts - self.star_counts_, 0, None)
        theta, _, _ = self._maximise_from_data(likelihood, counts,
                                               forward.bin_effective_area_deg2(),
                                               starts=self._maxima)
        return np.array(theta, dtype=float)

    def _maximise_from_data(self, likelihood, counts, bin_area, starts=()):
        """Maximise ``likelihood``; returns ``(theta, loglike, maxima)``.

        Parameters
        ----------
        likelihood : _Likelihood
        counts, bin_area : ndarray, shape (n_bins,)
            Counts and mean effective area per bin of the forward model (all bins), for the
            data start: a line fit to the rough densities ``counts / (bin_area * width)``.
        starts : sequence of ndarray
            Parameter vectors to start from first (a refit of perturbed data starts from the
            full fit's local maxima); the best converged one is taken, and the search from the
            data runs only when none converges.

        Notes
        -----
        A model with one location parameter (m_break) scans it over every bin edge and centre
        in its range with the other parameters refitted at each position, then frees it from
        every position. With sharp bins and little scatter the likelihood in m_break has local
        maxima about a bin apart and within bins; ``maxima`` lists the distinct ones within
        ``_REFIT_START_DELTA_LOGLIKE`` of the best (best first) so that refits of perturbed
        data can start from each.
        """
        template = likelihood.template
        names = template.param_names
        found = []
        for start in starts:
            try:
                found.append(likelihood.maximise(dict(zip(names, start, strict=True))))
            except CountsFitError:
                continue
        if not found:
            found = self._search_from_data(likelihood, counts, bin_area)
        maxima = []
        location = [names.index(n) for n in template._location_params]
        for theta, value in sorted(found, key=lambda pair: -pair[1]):
            # Distinct maxima: location parameters more than 1e-3 mag apart (a hundredth of a
            # typical error; closer ones are the same maximum reached from two sides).
            if all(np.max(np.abs(theta[location] - other[location]), initial=0.0) > 1e-3
                   for other, _ in maxima):
                maxima.append((theta, value))
        theta, loglike = maxima[0]
        if not math.isfinite(loglike):
            raise CountsFitError("the count fit found no parameters with a finite likelihood")
        close = [t for t, value in maxima if value >= loglike - _REFIT_START_DELTA_LOGLIKE]
        return theta, loglike, close[:_REFIT_MAX_STARTS]

    def _search_from_data(self, likelihood, counts, bin_area):
        """Converged ``(theta, loglike)`` pairs from the data start (and a scan of m_break)."""
        template = likelihood.template
        names = template.param_names
        fit_lo, fit_hi = likelihood.fit_range
        edges = self.forward.bin_edges_mag
        widths = np.diff(edges)
        centres = 0.5 * (edges[1:] + edges[:-1])
        used = (edges[:-1] >= fit_lo) & (edges[1:] <= fit_hi)
        good = used & (counts > 0) & (bin_area > 0)
        m = centres[good]
        log10_n = np.log10(counts[good] / (bin_area[good] * widths[good]))
        start = template._initial_params(m, log10_n, fit_lo, fit_hi)
        if len(template._location_params) != 1:
            return [likelihood.maximise(start)]
        name = template._location_params[0]
        low, high = likelihood.location_range
        # Every bin edge and centre in the break's range (at most 101, evenly thinned).
        positions = np.unique(np.r_[edges[:-1][used], edges[1:][used], centres[used]])
        slack = 1e-9 * max(1.0, abs(low), abs(high))
        positions = positions[(positions >= low - slack) & (positions <= high + slack)]
        if positions.size > 101:
            positions = positions[np.round(np.linspace(0, positions.size - 1, 101)).astype(int)]
        found = []
        for position in np.clip(positions, low, high):
            trial = dict(start)
            trial[name] = float(position)
            bright = m <= position
            if "slope_bright" in trial and bright.sum() >= 2:
                trial["slope_bright"] = _line_fit(m[bright], log10_n[bright])[1]
            if "slope_faint" in trial and (~bright).sum() >= 2:
                trial["slope_faint"] = _line_fit(m[~bright], log10_n[~bright])[1]
            try:
                theta, _ = likelihood.maximise(trial, fixed={name: float(position)})
                found.append(likelihood.maximise(dict(zip(names, theta, strict=True))))
            except CountsFitError:
                continue
        if not found:
            raise CountsFitError(
                f"the count fit did not converge: no {name} in [{low:g}, {high:g}] mag gave a "
                "converged fit"
            )
        return found

    @staticmethod
    def _warn_at_range_edge(template, theta, fit_range, location_range):
        low, high = location_range
        for name in template._location_params:
            value = float(theta[template.param_names.index(name)])
            # Within 1e-9 of a limit: the optimiser's bound, not a fitted position.
            slack = 1e-9 * max(1.0, abs(low), abs(high))
            if value <= low + slack or value >= high - slack:
                side = "bright" if value <= low + slack else "faint"
                warnings.warn(
                    f"`{name}` of {template.name} sits on its {side} limit {value:g} mag (two "
                    f"bins inside the fit range [{fit_range[0]:g}, {fit_range[1]:g}]): the data "
                    "show no break inside that range",
                    CountsWarning,
                    stacklevel=3,
                )

    def _poisson_covariance(self, likelihood, theta, template):
        names = template.param_names
        minimum_steps = np.array(
            [3.0 * self.forward.grid_step_mag if n in template._location_params else 1e-7
             for n in names]
        )
        steps = np.maximum(np.array([1e-3] * len(names)), minimum_steps)
        for _ in range(2):
            # -ln L up to a constant, in its precise half-deviance form.
            hessian = _numerical_hessian(likelihood.half_deviance, theta, steps)
            try:
                np.linalg.cholesky(hessian)
            except np.linalg.LinAlgError as error:
                raise CountsFitError(
                    f"{template.name} fit: the likelihood's curvature is not positive definite "
                    "at the optimum ("
                    + ", ".join(f"{n} = {v:.4g}" for n, v in zip(names, theta, strict=True))
                    + "); the "
                    "data do not constrain every parameter (narrow the model or widen the range)"
                ) from error
            cov = np.linalg.inv(hessian)
            cov = 0.5 * (cov + cov.T)
            # Refine: a tenth of each sigma keeps the differences local but well above noise.
            steps = np.maximum(0.1 * np.sqrt(np.diag(cov)), minimum_steps)
        return cov

    def _jackknife(self, likelihood, regions, region_grids, used, maxima, tick=None,
                   region_stars=None):
        """Parameters refitted with each region left out, shape (K, n_params).

        With star counts each refit leaves the region's stars out with its sources.
        """
        forward = self.forward
        kernel = forward.kernel[used]
        total_grid = forward.effective_area_grid_deg2
        total_counts = regions.sum(axis=0)
        n_params = len(likelihood.names)
        values = []
        for k in range(regions.shape[0]):
            counts_k = total_counts - regions[k]
            if counts_k[used].sum() <= n_params:
                raise InputError(
                    f"leaving out region {k} leaves {int(counts_k[used].sum())} sources; too "
                    "few for a jackknife refit (use fewer, larger regions)"
                )
            grid_k = total_grid - region_grids[k]
            stars_k = None
            if region_stars is not None and likelihood.background is not None:
                stars_k = region_stars.sum(axis=0) - region_stars[k]
            likelihood_k = _Likelihood(likelihood.template, forward._cell_lo, forward._cell_hi,
                                       kernel * grid_k[None, :], counts_k[used],
                                       likelihood.fit_range, likelihood.location_range,
                                       None if stars_k is None else stars_k[used])
            start_k = counts_k if stars_k is None else np.clip(counts_k - stars_k, 0, None)
            try:
                theta_k, _, _ = self._maximise_from_data(
                    likelihood_k, start_k, _correction_areas(forward, None, grid_k),
                    starts=maxima,
                )
            except CountsFitError as error:
                raise CountsFitError(
                    f"the jackknife refit without region {k} failed: {error}"
                ) from error
            values.append(theta_k)
            if tick is not None:
                tick(1)
        return np.array(values)

    def _bootstrap_exceedances(self, likelihood, maxima, mu, deviance, n_bootstrap, generator,
                               bin_area, tick=None):
        """Redraws (of ``n_bootstrap``) whose refitted deviance is at least the data's."""
        exceed = 0
        edges = self.forward.bin_edges_mag
        fit_lo, fit_hi = likelihood.fit_range  # edges of the fitted bins, exactly
        used = (edges[:-1] >= fit_lo) & (edges[1:] <= fit_hi)
        full = np.zeros(self.forward.n_bins)
        for _ in range(n_bootstrap):
            if tick is not None:
                tick(1)
            draw = generator.poisson(mu)
            if draw.sum() == 0:
                exceed += 1
                continue
            redraw = likelihood.with_counts(draw)
            full[used] = draw
            try:
                theta_b, _, _ = self._maximise_from_data(redraw, full, bin_area, starts=maxima)
            except CountsFitError as error:
                raise CountsFitError(
                    f"a parametric-bootstrap refit failed ({error}); set n_bootstrap=0 to skip "
                    "the p-value"
                ) from error
            exceed += redraw.deviance(theta_b) >= deviance
        return int(exceed)

    def _estimates(self, model, cov_poisson, cov, cov_jackknife, cov_stars=None):
        estimates = {}
        for i, name in enumerate(model.param_names):
            var_total = float(cov[i, i])
            var_poisson = float(cov_poisson[i, i])
            var_jackknife = None if cov_jackknife is None else float(cov_jackknife[i, i])
            budget = _budget(var_poisson, var_total, self.n_regions_ > 0,
                             None if cov_stars is None else float(cov_stars[i, i]))
            dof = _satterthwaite_dof(var_total, var_jackknife, self.n_regions_)
            estimates[name] = _student_estimate(
                getattr(model, name), math.sqrt(max(var_total, 0.0)), dof,
                model._param_units.get(name, ""), budget,
            )
        return estimates

    # -------------------------------------------------------------- results
    #: Attributes that exist only after fit(); reading one earlier raises NotFittedError.
    _FITTED_ATTRIBUTES = frozenset(
        {
            "model_", "params_", "cov_", "cov_poisson_", "cov_jackknife_", "jackknife_params_",
            "cov_stars_", "star_jacobian_", "star_counts_", "region_star_counts_", "n_stars_",
            "loglike_", "deviance_", "dof_", "p_value_", "p_value_error_",
            "p_value_is_bound_", "aic_", "bic_",
            "n_sources_", "n_bins_",
            "n_regions_", "expected_counts_", "used_bins_", "fit_range_", "observed_counts_",
            "region_counts_", "region_area_grids_", "estimates_",
        }
    )

    def __getattr__(self, name):
        # Only called when normal lookup fails, i.e. for fitted attributes before fit().
        if name in CountsFit._FITTED_ATTRIBUTES:
            raise NotFittedError(
                f"this CountsFit is not fitted yet; call fit() before reading `{name}`"
            )
        raise AttributeError(f"'CountsFit' object has no attribute {name!r}")

    def _fitted(self, name):
        try:
            return self.__dict__[name]
        except KeyError:
            raise NotFittedError(
                f"this CountsFit is not fitted yet; call fit() before reading `{name}`"
            ) from None

    def estimate(self, name):
        """The Estimate of a fitted parameter by name (``slope``, ``log10_norm``, ...)."""
        estimates = self._fitted("estimates_")
        if name not in estimates:
            raise InputError(
                f"`name` must be one of {list(estimates)}; got {name!r}"
            )
        return estimates[name]

    def profile_interval(self, name, level=0.68):
        """Profile-likelihood interval of one parameter (Poisson likelihood only).

        Parameters
        ----------
        name : str
            Parameter name, e.g. ``"slope"``, ``"slope_faint"``.
        level : float
            Confidence level in (0, 1); 0.68 by default.

        Returns
        -------
        tuple of float
            ``(lo, hi)`` where ``2 [ln L_max - ln L_profile(x)] = chi2_1^-1(level)``.

        Notes
        -----
        Wilks 1938, Ann. Math. Statist. 9, 60: twice the log-likelihood ratio is asymptotically
        chi-squared with one degree of freedom. The other parameters are re-maximised at each
        trial value (the normalisation in closed form). The interval reflects Poisson noise
        only; with regions, widen it by ``sqrt(cov_[i, i] / cov_poisson_[i, i])`` to include
        clustering.
        """
        model = self._fitted("model_")
        if name not in model.param_names:
            raise InputError(f"`name` must be one of {list(model.param_names)}; got {name!r}")
        level = _check_real(level, "level", 0.0, 1.0)
        key = (name, level)
        if key in self._profiles:
            return self._profiles[key]
        likelihood = self._likelihood
        index = model.param_names.index(name)
        best = model.params
        target = float(stats.chi2.ppf(level, 1))
        start = dict(zip(model.param_names, best, strict=True))
        sigma = math.sqrt(self.cov_poisson_[index, index])

        def deficit(x):
            _, value = likelihood.maximise(start, fixed={name: float(x)})
            return 2.0 * (self.loglike_ - value) - target

        ends = []
        for direction in (-1.0, 1.0):
            step = 1.5 * math.sqrt(target) * sigma
            x = best[index] + direction * step
            for _ in range(30):
                if deficit(x) > 0.0:
                    break
                step *= 2.0
                x = best[index] + direction * step
            else:
                raise CountsFitError(
                    f"the profile likelihood of `{name}` does not fall by {target:.3g} on the "
                    f"{'bright' if direction < 0 else 'faint'} side; the interval is open"
                )
            ends.append(optimize.brentq(deficit, *sorted((best[index], x)), xtol=1e-6 * sigma))
        interval = (float(min(ends)), float(max(ends)))
        self._profiles[key] = interval
        return interval

    def integral_counts(self, m_limit, area_deg2=None, n_draws=4000, rng=None,
                        covariance="reported"):
        """N(<m_limit) per deg^2 and over the footprint; see :func:`integral_counts`."""
        return integral_counts(self, m_limit, area_deg2=area_deg2, n_draws=n_draws, rng=rng,
                               covariance=covariance)

    def differential_counts(self, level=0.68):
        """Raw and corrected binned counts of the fitted data; see :func:`differential_counts`."""
        self._fitted("model_")
        return _differential_counts(
            self.observed_counts_, self.forward, self, self.region_counts_,
            self.region_area_grids_, level, self.star_counts_, self.region_star_counts_,
        )

    def to_json(self):
        """Fit summary with the ``results.json`` names and Estimate JSON values."""
        model = self._fitted("model_")
        out = {
            "model": model.name,
            "reference_mag": float(model.reference_mag),
            "fit_range": [float(self.fit_range_[0]), float(self.fit_range_[1])],
            "n_sources": int(self.n_sources_),
            "n_bins": int(self.n_bins_),
            "n_regions": int(self.n_regions_),
        }
        for name in model.param_names:
            out[name] = self.estimates_[name].to_json()
        out.update(
            {
                "loglike": float(self.loglike_),
                "deviance": float(self.deviance_),
                "dof": int(self.dof_),
                "p_value": None if self.p_value_ is None else float(self.p_value_),
                "p_value_error": (
                    None if self.p_value_error_ is None else float(self.p_value_error_)
                ),
                "p_value_is_bound": self.p_value_is_bound_,
                "n_bootstrap": int(self.n_bootstrap),
                "aic": float(self.aic_),
                "bic": float(self.bic_),
            }
        )
        return out

    def summary(self):
        """A few readable lines: the parameters and the goodness of fit."""
        model = self._fitted("model_")
        lines = [
            f"{model.name} fit to {self.n_sources_} sources in {self.n_bins_} bins "
            f"[{self.fit_range_[0]:g}, {self.fit_range_[1]:g}] mag"
            + (f", jackknife over {self.n_regions_} regions" if self.n_regions_ else "")
        ]
        for name in model.param_names:
            lines.append(f"  {name:13s} {self.estimates_[name].format()}")
        if self.p_value_ is None:
            p_text = "p not computed"
        elif self.p_value_is_bound_:
            p_text = f"p < {format_p_bound(self.p_value_)}, no redraw as extreme"
        else:
            p_text = f"p = {self.p_value_:.3g} +/- {self.p_value_error_:.2g}"
        lines.append(
            f"  deviance {self.deviance_:.4g} on {self.dof_} dof (bootstrap {p_text}); "
            f"AIC {self.aic_:.6g}, BIC {self.bic_:.6g}"
        )
        return "\n".join(lines)

    def __repr__(self):
        state = "fitted" if "model_" in self.__dict__ else "not fitted"
        name = self.model if isinstance(self.model, str) else type(self.model).__name__
        return f"CountsFit(model={name!r}, fit_range_mag={self.fit_range_mag!r}) [{state}]"


def _satterthwaite_dof(var_total, var_jackknife, n_regions):
    """Effective degrees of freedom of a variance that leans on a K-region jackknife.

    Notes
    -----
    The jackknife variance v_J from K regions has K - 1 degrees of freedom (Tukey 1958: the
    pseudo-values are treated as K independent values; from memory), so var(v_J) ~
    2 v_J^2 / (K - 1), while the Poisson floor is known. For the reported variance v the
    Welch-Satterthwaite approximation (Satterthwaite 1946, Biometrics Bull. 2, 110) gives
    ``nu = 2 v^2 / var(v) = (K - 1) (v / v_J)^2``: K - 1 when the jackknife dominates, more
    when the Poisson floor does. Infinite without a jackknife.
    """
    if var_jackknife is None or n_regions < 2 or not var_jackknife > 0.0:
        return math.inf
    return (n_regions - 1.0) * (var_total / var_jackknife) ** 2


def _student_estimate(value, sigma, dof, unit, budget):
    """A symmetric Estimate with Student-t quantiles (normal for infinite ``dof``)."""
    if not math.isfinite(dof):
        return Estimate.from_normal(value, sigma, unit, budget=budget)
    q68 = float(stats.t.ppf(0.84, dof))
    q95 = float(stats.t.ppf(0.975, dof))
    return Estimate(
        median=value,
        interval_68=(value - q68 * sigma, value + q68 * sigma),
        interval_95=(value - q95 * sigma, value + q95 * sigma),
        unit=unit,
        budget=budget,
    )


def _budget(var_poisson, var_total, with_regions, var_stars=None):
    """Shares of a variance: Poisson, the stars subtracted (when given), clustering (the rest).

    Without regions the Poisson and star shares are scaled to sum to 1.
    """
    if var_stars is None:
        if not with_regions or not var_total > 0.0:
            return {_POISSON: 1.0}
        poisson = min(max(var_poisson / var_total, 0.0), 1.0)
        return {_POISSON: poisson, _CLUSTERING: 1.0 - poisson}
    var_stars = max(var_stars, 0.0)
    floor = var_poisson + var_stars
    if not floor > 0.0:
        return {_POISSON: 1.0, _STARS: 0.0, **({_CLUSTERING: 0.0} if with_regions else {})}
    if not with_regions or not var_total > 0.0:
        return {_POISSON: var_poisson / floor, _STARS: var_stars / floor}
    scale = min(1.0, var_total / floor)  # the floor is part of the total (never above it)
    poisson = scale * var_poisson / var_total
    stars = scale * var_stars / var_total
    return {_POISSON: poisson, _STARS: stars, _CLUSTERING: max(1.0 - poisson - stars, 0.0)}


def fit_counts(observed_counts, forward, model="power_law", fit_range_mag=None, n_bootstrap=200,
               rng=None, region_counts=None, region_effective_area_deg2=None):
    """Shorthand for ``CountsFit(model, forward, fit_range_mag, n_bootstrap).fit(...)``.

    Examples
    --------
    >>> truth = PowerLaw(log10_norm=3.0, slope=0.5, reference_mag=22.0)
    >>> forward = ForwardModel(np.arange(20.0, 24.01, 0.5), effective_area_deg2=1.0)
    >>> counts = np.random.default_rng(3).poisson(forward.expected_counts(truth))
    >>> fit = fit_counts(counts, forward, PowerLaw(reference_mag=22.0), n_bootstrap=0)
    >>> bool(abs(fit.params_["slope"] - 0.5) < 3 * math.sqrt(fit.cov_[1, 1]))
    True
    """
    return CountsFit(model, forward, fit_range_mag=fit_range_mag, n_bootstrap=n_bootstrap).fit(
        observed_counts, rng=rng, region_counts=region_counts,
        region_effective_area_deg2=region_effective_area_deg2,
    )


# ============================================================================ integral counts
@dataclass(frozen=True, eq=False)
class IntegralCounts:
    """Integral counts N(<m_limit) with intervals.

    Parameters
    ----------
    m_limit : float
        Faint limit (AB).
    per_deg2 : Estimate
        N(<m_limit) per deg^2 (the population's mean surface density).
    total : Estimate
        Expected number over the footprint, ``per_deg2 * area_deg2`` (unit "").
    area_deg2 : float
        Footprint area used for ``total``.
    model : str
        Name of the count model.
    """

    m_limit: float
    per_deg2: Estimate
    total: Estimate
    area_deg2: float
    model: str

    def to_json(self):
        """``{"m_limit", "area_deg2", "model", "per_deg2": Estimate, "total": Estimate}``."""
        return {
            "m_limit": float(self.m_limit),
            "area_deg2": float(self.area_deg2),
            "model": self.model,
            "per_deg2": self.per_deg2.to_json(),
            "total": self.total.to_json(),
        }

    def __str__(self):
        return (
            f"N(<{self.m_limit:g}) = {self.per_deg2.format()} ; over {self.area_deg2:.6g} deg^2: "
            f"{self.total.format()}"
        )


def integral_counts(fit, m_limit, area_deg2=None, n_draws=4000, rng=None,
                    covariance="reported"):
    """Integral counts N(<m_limit) per deg^2 and over the footprint, with intervals.

    Parameters
    ----------
    fit : CountsFit
        A fitted count fit.
    m_limit : float
        Faint limit (AB).
    area_deg2 : float, optional
        Footprint area for the total; default ``fit.forward.area_deg2``.
    n_draws : int
        Parameter draws; >= 100.
    rng : int or numpy.random.Generator, optional
        For the draws.
    covariance : {"reported", "poisson"}
        Draw the parameters from the fit's reported covariance ``cov_`` (Poisson, plus the
        jackknife's clustering excess with regions), or from the Poisson part
        ``cov_poisson_`` alone (plus ``cov_stars_`` when stars were subtracted): the density
        this footprint holds, whose only uncertainty is Poisson noise (an analytic cosmic
        variance can then be added for the population's mean, see
        :mod:`countscale.variance`).

    Returns
    -------
    IntegralCounts

    Warns
    -----
    CountsWarning
        When ``m_limit`` is fainter than the fit range (extrapolation).

    Raises
    ------
    CountsFitError
        When N(<m) diverges at the fitted parameters or for some parameter draws (a bright
        slope <= 0 at the fit or within the errors, and no ``m_bright`` on the model).

    Notes
    -----
    Parameters are drawn from a multivariate normal with the fit's reported covariance
    ``cov_`` (Poisson, or Poisson + clustering), and N(<m_limit) evaluated for each draw; the
    Estimate keeps the draws. With a jackknife the draws are multivariate Student t (normal
    draws divided by sqrt(chi2_nu / nu)) with the Welch-Satterthwaite degrees of freedom nu of
    the variance of log10 N (see ``_satterthwaite_dof``), so the intervals allow for the
    uncertainty of a variance estimated from K regions. The "truth" this estimates is the mean
    density of the population (what extrapolation to other areas needs), not the realised
    number in this footprint. The budget splits the variance of log10 N by the delta method:
    ``g^T C_P g / g^T C g`` is the Poisson share, ``g^T C_S g / g^T C g`` the subtracted
    stars' share (``"stars"``, when star counts were given), the rest is clustering
    (``"cosmic_variance"``).
    """
    if not isinstance(fit, CountsFit):
        raise InputTypeError(f"`fit` must be a CountsFit; got {type(fit).__name__}")
    model = fit._fitted("model_")
    m_limit = _check_real(m_limit, "m_limit")
    if area_deg2 is None:
        area = fit.forward.area_deg2
    else:
        area = _check_real(area_deg2, "area_deg2", 0.0)
    n_draws = _check_count(n_draws, "n_draws", 100)
    if covariance not in ("reported", "poisson"):
        raise InputError(f"`covariance` must be 'reported' or 'poisson'; got {covariance!r}")
    generator = _as_generator(rng)
    if m_limit > fit.fit_range_[1]:
        warnings.warn(
            f"`m_limit` {m_limit:g} is {m_limit - fit.fit_range_[1]:.3g} mag fainter than the fit "
            f"range [{fit.fit_range_[0]:g}, {fit.fit_range_[1]:g}]; N(<m) is extrapolated",
            CountsWarning,
            stacklevel=2,
        )
    try:
        point = float(model.cumulative(m_limit))
    except InputError as error:
        # A fitted bright-end slope <= 0 is an outcome of the fit, not bad input.
        raise CountsFitError(
            f"N(<{m_limit:g}) diverges at the fitted parameters ({error}); set `m_bright` on "
            "the model"
        ) from error
    theta = model.params

    def log10_n(t):
        return math.log10(float(model.with_params(t).cumulative(m_limit)))

    # The subtracted stars' Poisson noise is measurement noise: part of "poisson" too.
    cov = fit.cov_ if covariance == "reported" else fit.cov_poisson_ + fit.cov_stars_
    with_regions = fit.n_regions_ > 0 and covariance == "reported"
    steps = np.maximum(1e-3 * np.sqrt(np.diag(cov)), 1e-9)
    gradient = _numerical_gradient(log10_n, theta, steps)
    var_total = float(gradient @ cov @ gradient)
    var_poisson = float(gradient @ fit.cov_poisson_ @ gradient)
    var_stars = (None if fit.star_counts_ is None
                 else float(gradient @ fit.cov_stars_ @ gradient))
    var_jackknife = (
        None if fit.cov_jackknife_ is None or not with_regions
        else float(gradient @ fit.cov_jackknife_ @ gradient)
    )
    budget = _budget(var_poisson, var_total, with_regions, var_stars)
    dof = _satterthwaite_dof(var_total, var_jackknife, fit.n_regions_)
    offsets = generator.multivariate_normal(
        np.zeros(theta.size), cov, size=n_draws, method="eigh"
    )
    if math.isfinite(dof):
        # Multivariate Student t: a normal draw over sqrt(chi2_nu / nu).
        offsets *= np.sqrt(dof / generator.chisquare(dof, size=n_draws))[:, None]
    draws_theta = theta + offsets
    values = np.empty(n_draws)
    n_bad = 0
    for i, t in enumerate(draws_theta):
        try:
            values[i] = float(model.with_params(t).cumulative(m_limit))
        except InputError:
            values[i] = np.nan
        if not (np.isfinite(values[i]) and values[i] > 0.0):
            n_bad += 1
    if n_bad:
        raise CountsFitError(
            f"N(<{m_limit:g}) diverges or vanishes for {n_bad} of {n_draws} parameter draws (a "
            "bright-end slope <= 0 lies within the errors); set `m_bright` on the model"
        )

    per_deg2 = Estimate.from_draws(values, _CUMULATIVE_UNIT, budget=budget)
    if not math.isfinite(point):
        raise CountsFitError(f"N(<{m_limit:g}) is not finite at the fitted parameters")
    return IntegralCounts(
        m_limit=m_limit,
        per_deg2=per_deg2,
        total=per_deg2.scale(area, ""),
        area_deg2=area,
        model=model.name,
    )


# ============================================================================ differential counts
@dataclass(frozen=True, eq=False)
class DifferentialCounts:
    """Binned differential counts for tables and plots (read by the plotting module).

    All densities are per deg^2 per mag; arrays have shape (n_bins,) unless stated.

    Parameters
    ----------
    mag_lo, mag_hi : ndarray
        Bin edges (observed magnitudes, AB).
    n_observed : ndarray of int
        Sources per bin.
    raw_density : ndarray
        ``N / (area_deg2 * width)``: no correction at all.
    raw_interval_68 : ndarray, shape (n_bins, 2)
        Garwood 68 % Poisson interval of ``raw_density``.
    corrected_density : ndarray
        ``N / (A_corr * width)`` with A_corr the correction area (see ``correction``); with
        ``n_stars``, ``(N - S) / (A_corr * width)``: galaxies only.
    corrected_interval_68 : ndarray, shape (n_bins, 2)
        Poisson-only 68 % interval of ``corrected_density`` (with stars, the Garwood
        half-widths of N and sqrt(S) added in quadrature, clipped at 0).
    corrected_interval_68_full : ndarray, shape (n_bins, 2), or None
        Poisson + clustering interval (jackknife over regions); None without regions.
    completeness : ndarray
        Mean completeness over each bin (true magnitudes).
    correction : str
        ``"forward_model"``: A_corr = mu_i / int_bin n(m; fit) dm, the fitted ratio of expected
        observed to intrinsic counts (includes scatter in and out of the bin; model-dependent);
        ``"effective_area"``: A_corr = mean A_eff over the bin (no fit, no scatter correction).
    model_density : ndarray or None
        Bin-averaged fitted model density, ``int_bin n dm / width``.
    used_in_fit : ndarray of bool or None
        Bins inside the fit range.
    area_deg2 : float
        Footprint area used for ``raw_density``.
    n_stars : ndarray of int or None
        Stars per bin subtracted from the corrected counts (a star catalogue of the same
        survey); None when none were. ``n_observed`` and the raw densities keep them.
    """

    mag_lo: np.ndarray
    mag_hi: np.ndarray
    n_observed: np.ndarray
    raw_density: np.ndarray
    raw_interval_68: np.ndarray
    corrected_density: np.ndarray
    corrected_interval_68: np.ndarray
    corrected_interval_68_full: np.ndarray | None
    completeness: np.ndarray
    correction: str
    model_density: np.ndarray | None
    used_in_fit: np.ndarray | None
    area_deg2: float
    unit: str = _DENSITY_UNIT
    n_stars: np.ndarray | None = None

    @property
    def mag_centre(self):
        """Bin centres (mag)."""
        return 0.5 * (self.mag_lo + self.mag_hi)

    def to_json(self):
        """Plain lists (NaN for undefined corrected values become None)."""

        def listed(array):
            if array is None:
                return None
            return [None if not np.isfinite(v) else float(v) for v in np.asarray(array).ravel()]

        def pairs(array):
            if array is None:
                return None
            return [[None if not np.isfinite(v) else float(v) for v in row] for row in array]

        return {
            "unit": self.unit,
            "area_deg2": float(self.area_deg2),
            "correction": self.correction,
            "mag_lo": listed(self.mag_lo),
            "mag_hi": listed(self.mag_hi),
            "n_observed": [int(v) for v in self.n_observed],
            "raw_density": listed(self.raw_density),
            "raw_interval_68": pairs(self.raw_interval_68),
            "corrected_density": listed(self.corrected_density),
            "corrected_interval_68": pairs(self.corrected_interval_68),
            "corrected_interval_68_full": pairs(self.corrected_interval_68_full),
            "completeness": listed(self.completeness),
            "model_density": listed(self.model_density),
            "used_in_fit": (
                None if self.used_in_fit is None else [bool(v) for v in self.used_in_fit]
            ),
            "n_stars": None if self.n_stars is None else [int(v) for v in self.n_stars],
        }


def differential_counts(observed_counts, forward, fit=None, region_counts=None,
                        region_effective_area_deg2=None, level=0.68):
    """Raw and corrected differential counts per deg^2 per mag, with intervals.

    Parameters
    ----------
    observed_counts : array_like of int, shape (n_bins,)
        Sources per bin of ``forward``.
    forward : ForwardModel
        Bins, effective area and scatter.
    fit : CountsFit, optional
        A fit on these bins; the correction then uses the forward model at the fit
        (``correction == "forward_model"``), otherwise mean A_eff per bin.
    region_counts : array_like of int, shape (K, n_bins), optional
        Per-region counts for Poisson + clustering intervals (jackknife).
    region_effective_area_deg2 : sequence, length K, optional
        As for :meth:`CountsFit.fit`.
    level : float
        Interval level; 0.68 by default (the result's fields are named for 68 %).

    Returns
    -------
    DifferentialCounts

    Notes
    -----
    Poisson intervals are Garwood's (:func:`poisson_interval`) scaled by the bin's conversion
    factor. The full interval adds, in quadrature to each Poisson half-width, the excess of the
    delete-one jackknife variance of the corrected density over its Poisson variance
    ``d^2 / N`` (when positive): the same Poisson-floor rule as :func:`combine_covariances`.
    Bins with zero correction area give NaN corrected values.
    """
    if not isinstance(forward, ForwardModel):
        raise InputTypeError(f"`forward` must be a ForwardModel; got {type(forward).__name__}")
    counts = _as_counts(observed_counts, "observed_counts", (forward.n_bins,))
    if fit is not None:
        if not isinstance(fit, CountsFit):
            raise InputTypeError(f"`fit` must be a CountsFit; got {type(fit).__name__}")
        fit._fitted("model_")
        if fit.forward is not forward:
            raise InputError("`fit` must have been fitted with this `forward` model")
    grids = None
    regions = None
    if region_counts is not None:
        regions = _as_counts(region_counts, "region_counts")
        if regions.ndim != 2 or regions.shape[1] != forward.n_bins or regions.shape[0] < 3:
            raise InputError(
                f"`region_counts` must have shape (K >= 3, {forward.n_bins}); got {regions.shape}"
            )
        if not np.array_equal(regions.sum(axis=0), counts):
            raise InputError("`region_counts` must add up to `observed_counts` in every bin")
        if region_effective_area_deg2 is None:
            raise InputError("`region_effective_area_deg2` is needed with `region_counts`")
        grids = forward.region_area_grids(region_effective_area_deg2)
        if grids.shape[0] != regions.shape[0]:
            raise InputError(
                f"`region_effective_area_deg2` must have one entry per region "
                f"({regions.shape[0]}); got {grids.shape[0]}"
            )
    return _differential_counts(counts, forward, fit, regions, grids, level)


def _correction_areas(forward, fit, area_grid):
    """Correction area per bin (deg^2) for a given A_eff grid."""
    if fit is None:
        inside = (forward._bin_of_cell >= 0) & (forward._bin_of_cell < forward.n_bins)
        weighted = np.bincount(
            forward._bin_of_cell[inside],
            weights=(area_grid * forward.grid_width_mag)[inside],
            minlength=forward.n_bins,
        )
        return weighted / np.diff(forward.bin_edges_mag)
    model = fit.model_
    mu = forward._response_for(area_grid) @ forward._cell_density(model)
    intrinsic = forward.intrinsic_counts_per_deg2(model)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(intrinsic > 0.0, mu / intrinsic, 0.0)


def _differential_counts(counts, forward, fit, regions, grids, level, stars=None,
                         region_stars=None):
    level = _check_real(level, "level", 0.0, 1.0)
    edges = forward.bin_edges_mag
    widths = np.diff(edges)
    counts_f = counts.astype(float)
    lo, hi = poisson_interval(counts, level)
    raw_scale = 1.0 / (forward.area_deg2 * widths)
    correction_area = _correction_areas(forward, fit, forward.effective_area_grid_deg2)
    with np.errstate(divide="ignore", invalid="ignore"):
        corrected_scale = np.where(correction_area > 0.0, 1.0 / (correction_area * widths), np.nan)
    stars_f = np.zeros_like(counts_f) if stars is None else np.asarray(stars, dtype=float)
    galaxies = counts_f - stars_f
    corrected = galaxies * corrected_scale
    if stars is None:
        corrected_interval = np.column_stack([lo * corrected_scale, hi * corrected_scale])
    else:
        # Sources less stars: the Garwood half-widths of N and sqrt(S) in quadrature.
        low_half = np.sqrt((counts_f - lo) ** 2 + stars_f)
        high_half = np.sqrt((hi - counts_f) ** 2 + stars_f)
        corrected_interval = np.column_stack(
            [np.clip(galaxies - low_half, 0.0, None) * corrected_scale,
             (galaxies + high_half) * corrected_scale])
    full = None
    if regions is not None:
        total_grid = forward.effective_area_grid_deg2
        delete_one = []
        for k in range(regions.shape[0]):
            area_k = _correction_areas(forward, fit, total_grid - grids[k])
            with np.errstate(divide="ignore", invalid="ignore"):
                left = counts_f - regions[k]
                if stars is not None and region_stars is not None:
                    left = left - (stars_f - region_stars[k])
                delete_one.append(np.where(area_k > 0.0, left / (area_k * widths), np.nan))
        delete_one = np.array(delete_one)
        k_regions = delete_one.shape[0]
        centred = delete_one - np.nanmean(delete_one, axis=0)
        var_jack = (k_regions - 1.0) / k_regions * np.nansum(centred**2, axis=0)
        with np.errstate(divide="ignore", invalid="ignore"):
            # Poisson variance of (N - S) A^-1 w^-1: (N + S) times the scale squared.
            var_poisson = np.where(counts > 0, (counts_f + stars_f) * corrected_scale**2, 0.0)
        excess = np.clip(var_jack - var_poisson, 0.0, None)
        low_half = corrected - corrected_interval[:, 0]
        high_half = corrected_interval[:, 1] - corrected
        full = np.column_stack(
            [
                np.clip(corrected - np.sqrt(low_half**2 + excess), 0.0, None),
                corrected + np.sqrt(high_half**2 + excess),
            ]
        )
    model_density = None
    used = None
    if fit is not None:
        model_density = forward.intrinsic_counts_per_deg2(fit.model_) / widths
        used = fit.used_bins_.copy()
    return DifferentialCounts(
        mag_lo=_read_only(edges[:-1]),
        mag_hi=_read_only(edges[1:]),
        n_observed=_read_only(counts, dtype=np.int64),
        raw_density=_read_only(counts_f * raw_scale),
        raw_interval_68=_read_only(np.column_stack([lo * raw_scale, hi * raw_scale])),
        corrected_density=_read_only(corrected),
        corrected_interval_68=_read_only(corrected_interval),
        corrected_interval_68_full=None if full is None else _read_only(full),
        completeness=_read_only(forward.bin_completeness()),
        correction="effective_area" if fit is None else "forward_model",
        model_density=None if model_density is None else _read_only(model_density),
        used_in_fit=None if used is None else _read_only(used, dtype=bool),
        area_deg2=float(forward.area_deg2),
        n_stars=None if stars is None else _read_only(stars, dtype=np.int64),
    )


# ============================================================================ model comparison
@dataclass(frozen=True)
class ModelComparison:
    """AIC/BIC comparison of count fits to the same binned counts.

    Parameters
    ----------
    models : tuple of str
        Model names, in the order given.
    n_params : tuple of int
    loglike, aic, bic, delta_aic, delta_bic, akaike_weights : tuple of float
        Deltas are relative to the smallest value; Akaike weights
        ``exp(-delta_aic / 2) / sum`` (Burnham & Anderson 2002, Model Selection and Multimodel
        Inference, 2nd ed., sec. 2.9; from memory).
    best_aic, best_bic : str
        Names of the preferred models.
    """

    models: tuple[str, ...]
    n_params: tuple[int, ...]
    loglike: tuple[float, ...]
    aic: tuple[float, ...]
    bic: tuple[float, ...]
    delta_aic: tuple[float, ...]
    delta_bic: tuple[float, ...]
    akaike_weights: tuple[float, ...]
    best_aic: str
    best_bic: str

    def to_json(self):
        """``{model name: {"n_params", "loglike", "aic", "bic", "delta_aic", ...}}`` plus bests."""
        rows = {}
        for i, name in enumerate(self.models):
            rows[name] = {
                "n_params": self.n_params[i],
                "loglike": self.loglike[i],
                "aic": self.aic[i],
                "bic": self.bic[i],
                "delta_aic": self.delta_aic[i],
                "delta_bic": self.delta_bic[i],
                "akaike_weight": self.akaike_weights[i],
            }
        return {"models": rows, "best_aic": self.best_aic, "best_bic": self.best_bic}


def compare_models(fits):
    """Compare fitted count models by AIC and BIC.

    Parameters
    ----------
    fits : sequence of CountsFit
        At least two fits of different models to the same counts in the same bins.

    Returns
    -------
    ModelComparison
    """
    if isinstance(fits, CountsFit) or not isinstance(fits, Sequence):
        raise InputTypeError(f"`fits` must be a sequence of CountsFit; got {type(fits).__name__}")
    if len(fits) < 2:
        raise InputError(f"`fits` must hold at least 2 fits to compare; got {len(fits)}")
    for i, fit in enumerate(fits):
        if not isinstance(fit, CountsFit):
            raise InputTypeError(f"`fits[{i}]` must be a CountsFit; got {type(fit).__name__}")
        fit._fitted("model_")
    first = fits[0]
    for i, fit in enumerate(fits[1:], start=1):
        same_bins = np.array_equal(
            fit.forward.bin_edges_mag[:-1][fit.used_bins_],
            first.forward.bin_edges_mag[:-1][first.used_bins_],
        ) and np.array_equal(fit.fit_range_, first.fit_range_)
        same_counts = same_bins and np.array_equal(
            fit.observed_counts_[fit.used_bins_], first.observed_counts_[first.used_bins_]
        )
        if not same_counts:
            raise InputError(
                f"`fits[{i}]` was fitted to other bins or counts than `fits[0]`; AIC and BIC "
                "compare models on the same data only"
            )
    names = tuple(fit.model_.name for fit in fits)
    if len(set(names)) != len(names):
        names = tuple(f"{name}#{i}" for i, name in enumerate(names))
    aic = np.array([fit.aic_ for fit in fits])
    bic = np.array([fit.bic_ for fit in fits])
    delta_aic = aic - aic.min()
    delta_bic = bic - bic.min()
    weights = np.exp(-0.5 * delta_aic)
    weights /= weights.sum()
    return ModelComparison(
        models=names,
        n_params=tuple(len(fit.model_.param_names) for fit in fits),
        loglike=tuple(float(fit.loglike_) for fit in fits),
        aic=tuple(float(v) for v in aic),
        bic=tuple(float(v) for v in bic),
        delta_aic=tuple(float(v) for v in delta_aic),
        delta_bic=tuple(float(v) for v in delta_bic),
        akaike_weights=tuple(float(v) for v in weights),
        best_aic=names[int(np.argmin(aic))],
        best_bic=names[int(np.argmin(bic))],
    )


# ------------------------------------------------------------------------------------------
# Photometric scatter from a catalogue's own errors
# ------------------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class ScatterRelation:
    """Photometric scatter sigma(m) in mag, from the median quoted error in magnitude bins.

    Linear in log sigma between bin centres and constant beyond the first and last bins (a
    callable for :class:`ForwardModel`'s ``scatter_mag``).

    Attributes
    ----------
    mag : ndarray
        Bin centres (AB mag) of the bins with enough sources.
    sigma_mag : ndarray
        Median quoted error there, made non-decreasing with magnitude (errors of a
        sky-limited survey grow towards its limit) by a weighted isotonic fit in log sigma,
        each bin weighted by its number of sources: a sparse bin with odd errors is pooled
        with its crowded neighbours instead of lifting every fainter bin, as a running
        maximum would.
    n_sources : ndarray of int
    """

    mag: np.ndarray
    sigma_mag: np.ndarray
    n_sources: np.ndarray

    def __call__(self, m):
        m_array = np.asarray(m, dtype=float)
        out = np.exp(np.interp(m_array, self.mag, np.log(self.sigma_mag)))
        return out if m_array.ndim else float(out)

    def to_json(self):
        return {
            "mag": self.mag.tolist(),
            "sigma_mag": self.sigma_mag.tolist(),
            "n_sources": self.n_sources.tolist(),
        }


def _no_progress(_):
    """The progress callback when nobody watches."""


def format_p_bound(bound):
    """An upper bound on a p-value as text, rounded up to two significant figures.

    ``1 / 201`` gives ``"0.005"``: the text is never below the bound it stands for.
    """
    bound = float(bound)
    if not 0.0 < bound <= 1.0:
        raise InputError(f"`bound` must be in (0, 1]; got {bound}")
    scale = 10.0 ** (math.floor(math.log10(bound)) - 1)
    return f"{math.ceil(bound / scale - 1e-9) * scale:.2g}"


def scatter_from_errors(mag, mag_error, bin_width=0.25, min_sources=20, mag_range=None):
    """The scatter relation sigma(m) of a catalogue from its quoted magnitude errors.

    Parameters
    ----------
    mag, mag_error : array_like, shape (n,)
        Observed magnitudes and their quoted 1-sigma errors (mag). Rows with a non-finite or
        non-positive error are ignored here (they are still counted by the tally).
    bin_width : float
        Bin width in mag.
    min_sources : int
        Bins with fewer sources are left out.
    mag_range : (float, float), optional
        Only sources with ``lo <= mag <= hi`` are used (the magnitudes a count fit needs);
        default all.

    Notes
    -----
    The quoted error is taken at the observed magnitude and used as the scatter at the same
    true magnitude; the difference is second order in sigma for a smooth relation. Each bin
    gives the median error of its sources (robust to a few wild errors), and the medians are
    made non-decreasing by weighted isotonic regression in log sigma (pool adjacent
    violators, weights = sources per bin).
    """
    mag = np.asarray(mag, dtype=float)
    mag_error = np.asarray(mag_error, dtype=float)
    if mag.shape != mag_error.shape or mag.ndim != 1:
        raise InputError(
            f"`mag` and `mag_error` must be 1-D and of one length; got {mag.shape} and "
            f"{mag_error.shape}"
        )
    good = np.isfinite(mag) & np.isfinite(mag_error) & (mag_error > 0)
    usable = "finite, > 0"
    if mag_range is not None:
        lo, hi = (float(v) for v in mag_range)
        good &= (mag >= lo) & (mag <= hi)
        usable += f", at magnitudes in [{lo:g}, {hi:g}]"
    if good.sum() < min_sources:
        raise InputError(
            f"`mag_error` has {int(good.sum())} usable values ({usable}); at least "
            f"{min_sources} are needed for a scatter relation"
        )
    mag, mag_error = mag[good], mag_error[good]
    bin_width = _check_real(bin_width, "bin_width", 0.0)
    # Bin numbers stay floats: a magnitude such as 1e30 would overflow an integer cast.
    index = np.floor(mag / bin_width)
    order = np.argsort(index, kind="stable")
    index, errors = index[order], mag_error[order]
    starts = np.flatnonzero(np.r_[True, index[1:] != index[:-1]])
    ends = np.r_[starts[1:], len(index)]
    counts = ends - starts
    keep = counts >= min_sources
    if not keep.any():
        raise InputError(
            f"no magnitude bin of width {bin_width:g} holds {min_sources} sources with errors"
        )
    medians = np.array([np.median(errors[a:b]) for a, b in zip(starts[keep], ends[keep],
                                                                strict=True)])
    centres = (index[starts[keep]] + 0.5) * bin_width
    # Non-decreasing: the non-increasing isotonic fit of -log sigma.
    log_sigma = -pool_adjacent_violators(-np.log(medians), counts[keep])
    return ScatterRelation(centres, np.exp(log_sigma), counts[keep])
