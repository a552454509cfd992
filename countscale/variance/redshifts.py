"""Redshift distributions n(z) of a population, for angular clustering.

Topics
------
RedshiftDistribution
    A normalised p(z) on a grid, with its source, the number of sources it describes per
    steradian (when known) and its median.
Constructors
    ``from_redshifts`` (a catalogue's redshifts, smoothed), ``from_median`` (a parametric
    form with a given median), ``from_function`` (any dN/dz, e.g. a luminosity function's),
    ``from_arrays`` (a tabulated n(z)).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy import integrate, special

from countscale._checks import check_real
from countscale._checks import read_only as _read_only
from countscale._checks import real_array as _real_array
from countscale.errors import InputError, InputTypeError

__all__ = ["RedshiftDistribution"]

#: Grid points of a tabulated p(z); the Limber integral is smooth in z at this resolution.
_N_GRID = 400

#: Smail et al. 1994 (MNRAS 270, 245) form p(z) ~ z^alpha exp(-(z / z0)^beta): the exponents
#: commonly used for magnitude-limited galaxy samples (common figure, no source).
SMAIL_ALPHA = 2.0
SMAIL_BETA = 1.5


@dataclass(frozen=True, eq=False)
class RedshiftDistribution:
    """A population's redshift distribution, normalised to integrate to 1.

    Attributes
    ----------
    z : ndarray
        Increasing redshift grid (>= 0).
    pdf : ndarray
        p(z) on the grid, integral 1 (trapezoid rule).
    source : str
        Where it came from, in words (goes into results and reports).
    n_per_sr : float or None
        Sources per steradian the distribution describes (integral of dN/dz), when known.
    """

    z: np.ndarray
    pdf: np.ndarray
    source: str
    n_per_sr: float | None = None

    @property
    def median(self):
        """Median redshift."""
        cdf = integrate.cumulative_trapezoid(self.pdf, self.z, initial=0.0)
        return float(np.interp(0.5, cdf / cdf[-1], self.z))

    @property
    def mean(self):
        """Mean redshift."""
        return float(integrate.trapezoid(self.z * self.pdf, self.z))

    def __call__(self, z):
        """p(z) interpolated (0 outside the grid)."""
        z = _real_array("z", z)
        out = np.interp(z, self.z, self.pdf, left=0.0, right=0.0)
        return float(out) if out.ndim == 0 else out

    def to_json(self, n_points=60):
        """``{"source", "median", "mean", "n_per_sr", "z", "pdf"}`` on a coarse grid."""
        z = np.linspace(self.z[0], self.z[-1], n_points)
        return {
            "source": self.source,
            "median": self.median,
            "mean": self.mean,
            "n_per_sr": None if self.n_per_sr is None else float(self.n_per_sr),
            "z": [float(v) for v in z],
            "pdf": [float(v) for v in self(z)],
        }

    # ---------------------------------------------------------------- constructors
    @classmethod
    def from_arrays(cls, z, dndz, source="tabulated n(z)", n_per_sr=None):
        """From a tabulated n(z) (any normalisation; normalised here).

        Raises
        ------
        InputError
            Fewer than 2 points, z not increasing or negative, n(z) negative, non-finite or
            all zero.
        """
        z = _real_array("z", z)
        dndz = _real_array("dndz", dndz)
        if z.ndim != 1 or z.size < 2:
            raise InputError(f"`z` must be a 1-D grid of at least 2 redshifts; got shape "
                             f"{z.shape}")
        if dndz.shape != z.shape:
            raise InputError(f"`dndz` must have the shape of `z` {z.shape}; got {dndz.shape}")
        if not (np.all(np.isfinite(z)) and z[0] >= 0 and np.all(np.diff(z) > 0)):
            raise InputError(f"`z` must be finite, >= 0 and strictly increasing; got "
                             f"{z[:4].tolist()}...")
        bad = ~np.isfinite(dndz) | (dndz < 0)
        if bad.any():
            raise InputError(f"`dndz` must be finite and >= 0; got "
                             f"{float(dndz[bad][0])!r} at z = {float(z[bad][0]):g}")
        norm = float(integrate.trapezoid(dndz, z))
        if not norm > 0:
            raise InputError("`dndz` is zero everywhere: an empty redshift distribution")
        if not isinstance(source, str):
            raise InputTypeError(f"`source` must be a string; got {source!r}")
        if n_per_sr is not None:
            n_per_sr = check_real(n_per_sr, "n_per_sr", 0.0, low_open=False)
        return cls(_read_only(z), _read_only(dndz / norm), source, n_per_sr)

    @classmethod
    def from_redshifts(cls, z, weights=None, source="catalogue redshifts", bandwidth=None):
        """From a sample of redshifts: a histogram smoothed by a Gaussian kernel.

        Parameters
        ----------
        z : array_like
            Redshifts; non-finite values are an error (select before calling).
        weights : array_like, optional
            Per-source weights (e.g. 1 / completeness).
        bandwidth : float, optional
            Kernel width in z; default Scott's rule, 1.06 sigma N^(-1/5) (Silverman 1986,
            Density Estimation, eq. 3.28; from memory), at least 0.002.

        Notes
        -----
        The kernel is reflected at z = 0 so no probability is lost below zero. A histogram
        without smoothing would add its own noise to the integral of p(z)^2 that Limber's
        C_ell depends on; the kernel keeps that below ~0.1 % for thousands of redshifts.
        """
        z = _real_array("z", z)
        if z.ndim != 1:
            raise InputError(f"`z` must be 1-D; got shape {z.shape}")
        if z.size == 0:
            raise InputError("`z` holds no redshifts: an empty redshift distribution")
        bad = ~np.isfinite(z) | (z < 0)
        if bad.any():
            raise InputError(f"`z` must be finite and >= 0; got {float(z[bad][0])!r}")
        if weights is None:
            weights = np.ones_like(z)
        else:
            weights = _real_array("weights", weights)
            if weights.shape != z.shape or not np.all(np.isfinite(weights) & (weights >= 0)):
                raise InputError("`weights` must be finite, >= 0 and one per redshift")
        if z.size < 2:
            raise InputError(f"`z` must hold at least 2 redshifts; got {z.size}")
        if bandwidth is None:
            spread = float(np.sqrt(np.cov(z, aweights=weights))) if z.size > 1 else 0.0
            bandwidth = max(1.06 * spread * z.size ** -0.2, 0.002)
        else:
            bandwidth = check_real(bandwidth, "bandwidth", 0.0)
        top = float(z.max()) + 4.0 * bandwidth
        # At least two grid points per kernel width.
        n_grid = int(min(max(_N_GRID, 2.0 * top / bandwidth), 4000))
        grid = np.linspace(0.0, top, n_grid)
        step = grid[1] - grid[0]
        # Fine histogram, then a Gaussian smoothing on it (exact kernel density estimate up
        # to the histogram's binning, which is 10x finer than the kernel).
        fine = min(step, bandwidth / 10.0)
        edges = np.arange(0.0, top + fine, fine)
        counts, _ = np.histogram(z, bins=edges, weights=weights)
        centres = 0.5 * (edges[1:] + edges[:-1])
        dz = grid[:, None] - centres[None, :]
        mirrored = grid[:, None] + centres[None, :]
        kernel = np.exp(-0.5 * (dz / bandwidth) ** 2) + np.exp(-0.5 * (mirrored / bandwidth) ** 2)
        density = kernel @ counts
        return cls.from_arrays(grid, density,
                               source=f"{source} ({z.size:,d}, smoothed by {bandwidth:.3g} in z)")

    @classmethod
    def from_median(cls, z_median, alpha=SMAIL_ALPHA, beta=SMAIL_BETA):
        """The parametric form p(z) ~ z^alpha exp(-(z / z0)^beta) with a given median.

        Notes
        -----
        Smail, Ellis & Fitchett 1994, MNRAS 270, 245 (from memory) for the form; z0 is solved
        so that the median is ``z_median`` (the median of this form is z0 times the
        (beta)-th root of the inverse regularised gamma function at 1/2).
        """
        z_median = check_real(z_median, "z_median", 0.0)
        alpha = check_real(alpha, "alpha", -1.0)
        beta = check_real(beta, "beta", 0.0)
        shape = (alpha + 1.0) / beta
        z0 = z_median / special.gammaincinv(shape, 0.5) ** (1.0 / beta)
        top = z0 * special.gammaincinv(shape, 1.0 - 1e-9) ** (1.0 / beta)
        z = np.linspace(0.0, top, _N_GRID)
        pdf = z**alpha * np.exp(-((z / z0) ** beta))
        return cls.from_arrays(
            z, pdf, source=f"z^{alpha:g} exp(-(z/z0)^{beta:g}) with median z = {z_median:g}")

    @classmethod
    def from_function(cls, dndz: Callable, z_max, source="a dN/dz function", z_min=0.0):
        """From a function dN/dz (sources per unit redshift per sr, or any normalisation).

        Parameters
        ----------
        dndz : callable
            ``dndz(z_array) -> array``; evaluated once on the grid.
        z_max : float
            Largest redshift with sources.
        """
        if not callable(dndz):
            raise InputTypeError(f"`dndz` must be callable; got {type(dndz).__name__}")
        z_max = check_real(z_max, "z_max", 0.0)
        z_min = check_real(z_min, "z_min", 0.0, low_open=False)
        if z_min >= z_max:
            raise InputError(f"`z_min` must be below `z_max` ({z_max:g}); got {z_min:g}")
        z = np.linspace(z_min, z_max, _N_GRID)
        values = np.asarray(dndz(z), dtype=float)
        if values.shape != z.shape:
            raise InputError(f"`dndz` must return one value per redshift ({z.size}); got shape "
                             f"{values.shape}")
        total = float(integrate.trapezoid(values, z))
        return cls.from_arrays(z, values, source=source, n_per_sr=total if total > 0 else None)

