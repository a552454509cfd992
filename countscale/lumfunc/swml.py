"""The stepwise maximum-likelihood (SWML) estimator (Efstathiou, Ellis & Peterson 1988).

The luminosity (or mass) function is a step function, phi_k on bin k, and the likelihood is
STY's with that form (EEP 1988, MNRAS 232, 431, eqs. 2.9-2.12):

    ln L = sum_i w_i [ ln phi_k(i) - ln sum_j phi_j Delta_j H_ij ],

H_ij being the fraction of bin j inside the range galaxy i could have at its redshift. Its
maximum solves phi_k Delta_k = N_k / sum_i [w_i H_ik / sum_j phi_j Delta_j H_ij] (N_k the
weighted number of galaxies in bin k), iterated from a flat start to a relative change below
1e-10. Each iteration is O(n_galaxies): sum_j phi_j Delta_j H_ij is a difference of the
step function's running integral at the galaxy's two limits, and the sums over galaxies of
H_ik are difference arrays plus the two partial bins.

The likelihood does not fix the amplitude; it is set, as for STY, by the number of galaxies:
sum_k phi_k Delta_k V_k = sum_i w_i, with V_k the density-weighted volume over which bin k is
visible. The covariance is the inverse of the information matrix bordered by the gradient of
that constraint (EEP 1988, eq. 2.17 with this constraint in place of theirs; errors at fixed
total count), to which the count's own relative error (Poisson, or the jackknife over regions)
is added as a common scale: Cov = C_shape + phi phi^T sigma_count^2. Bins without a galaxy
are left out (their maximum-likelihood value is 0, with no usable error).
"""

from __future__ import annotations

from typing import Any

import numpy as np
from scipy import integrate

from countscale.errors import InputTypeError
from countscale.lumfunc.binned import BinnedFunction, bin_edges
from countscale.lumfunc.selection import Sample
from countscale.lumfunc.sty import LuminosityFunctionFitError, count_error

__all__ = ["swml_estimate"]

_CHUNK = 65536


class _Overlaps:
    """Each galaxy's visible range [lo, hi] located in the bins (the H_ij, implicitly)."""

    def __init__(self, edges: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> None:
        k = edges.size - 1
        self.edges, self.k = edges, k
        self.width = np.diff(edges)
        lo = np.clip(lo, edges[0], edges[-1])
        hi = np.clip(hi, edges[0], edges[-1])
        self.lo, self.hi = lo, hi
        self.j_lo = np.clip(np.searchsorted(edges, lo, side="right") - 1, 0, k - 1)
        self.j_hi = np.clip(np.searchsorted(edges, hi, side="left") - 1, 0, k - 1)
        same = self.j_lo == self.j_hi
        self.same = same
        w_lo = self.width[self.j_lo]
        w_hi = self.width[self.j_hi]
        self.f_same = np.where(same, (hi - lo) / w_lo, 0.0)
        self.f_lo = np.where(same, 0.0, (edges[self.j_lo + 1] - lo) / w_lo)
        self.f_hi = np.where(same, 0.0, (hi - edges[self.j_hi]) / w_hi)

    def d(self, phi: np.ndarray) -> np.ndarray:
        """sum_j phi_j Delta_j H_ij for every galaxy."""
        e = self.edges
        cum = np.concatenate([[0.0], np.cumsum(phi * self.width)])
        c_hi = cum[self.j_hi] + phi[self.j_hi] * (self.hi - e[self.j_hi])
        c_lo = cum[self.j_lo] + phi[self.j_lo] * (self.lo - e[self.j_lo])
        return c_hi - c_lo

    def sum_h(self, u: np.ndarray) -> np.ndarray:
        """sum_i u_i H_ik for every bin k."""
        k = self.k
        apart = ~self.same
        starts = np.bincount(self.j_lo[apart] + 1, weights=u[apart], minlength=k + 1)
        ends = np.bincount(self.j_hi[apart], weights=u[apart], minlength=k + 1)
        full = np.cumsum(starts - ends)[:k]
        partial = (np.bincount(self.j_lo, weights=u * (self.f_lo + self.f_same), minlength=k)
                   + np.bincount(self.j_hi, weights=u * self.f_hi, minlength=k))
        return full + partial

    def dense(self, rows: slice) -> np.ndarray:
        """H for a block of galaxies, shape (rows, k)."""
        j = np.arange(self.k)[None, :]
        j_lo = self.j_lo[rows, None]
        j_hi = self.j_hi[rows, None]
        h = ((j > j_lo) & (j < j_hi)).astype(float)
        h += (j == j_lo) * (self.f_lo[rows, None] + self.f_same[rows, None])
        h += (j == j_hi) * self.f_hi[rows, None]
        return h


def swml_estimate(sample: Sample, edges: Any = None, width: float | None = None,
                  Q: float | None = None, P: float | None = None, tol: float = 1e-10,
                  max_iter: int = 20000) -> BinnedFunction:
    """SWML luminosity or mass function of a :class:`Sample`.

    Parameters
    ----------
    sample : Sample
    edges, width : see :func:`countscale.lumfunc.vmax_estimate`
    Q, P : float, optional
        Evolution (default: the selection's).
    tol : float
        Convergence: largest relative change of phi in one iteration.
    max_iter : int

    Returns
    -------
    BinnedFunction
        ``extra`` holds ``covariance`` (of the bins reported), ``iterations``,
        ``n_outside_bins`` and the shape-only errors ``phi_err_shape``.
    """
    if not isinstance(sample, Sample):
        raise InputTypeError(f"`sample` must be a lumfunc Sample; got {type(sample).__name__}")
    x = sample.x(Q)
    if width is None and edges is None:
        width = 0.25 if sample.quantity == "luminosity" else 0.1
    e = bin_edges(x, width, edges)
    k = e.size - 1
    slot = np.searchsorted(e, x, side="right") - 1
    inside = (slot >= 0) & (slot < k)
    lo, hi = sample.limits(sample.z[inside], Q)
    overlaps = _Overlaps(e, lo, hi)
    w = sample.weight[inside]
    slot = slot[inside]
    counts = np.bincount(slot, weights=w, minlength=k)
    n = np.bincount(slot, minlength=k)
    occupied = counts > 0

    phi = np.where(occupied, 1.0, 0.0) / np.diff(e)
    phi /= (phi * np.diff(e)).sum()
    iteration = 0
    while True:
        iteration += 1
        d = overlaps.d(phi)
        den = overlaps.sum_h(w / d) * overlaps.width
        new = np.where(occupied, counts / np.where(den > 0, den, 1.0), 0.0)
        new /= (new * overlaps.width).sum()
        change = np.max(np.abs(new[occupied] - phi[occupied]) / new[occupied])
        phi = new
        if change < tol:
            break
        if iteration >= max_iter:
            raise LuminosityFunctionFitError(
                f"SWML did not converge in {max_iter} iterations (last relative change "
                f"{change:.2g})")

    volume = _bin_volumes(sample, e, Q, P)
    w_total = float(sample.weight.sum())
    in_bins = float(w.sum())
    scale = in_bins / float((phi * overlaps.width * volume).sum())
    phi = phi * scale

    cov_shape = _covariance(overlaps, phi, w, counts, occupied, volume)
    count = count_error(sample, w_total)
    count_var = count["jackknife"] if count["jackknife"] is not None else count["poisson"]
    phi_occ = phi[occupied]
    cov = cov_shape + np.outer(phi_occ, phi_occ) * count_var
    err = np.sqrt(np.diag(cov))
    x_lo, x_hi = sample.x_range(Q)
    complete = ((e[:-1] >= x_lo) & (e[1:] <= x_hi))[occupied]
    return BinnedFunction(
        method="swml", x_name=sample.x_name, edges=e,
        centre=0.5 * (e[:-1] + e[1:])[occupied], lower=e[:-1][occupied],
        upper=e[1:][occupied], phi=phi_occ, phi_err=err, n=n[occupied], complete=complete,
        error_kind=("information matrix + count error ("
                    + ("jackknife over regions" if count["jackknife"] is not None
                       else "Poisson") + ")"),
        extra={"covariance": cov, "phi_err_shape": np.sqrt(np.diag(cov_shape)),
               "iterations": iteration, "n_outside_bins": int((~inside).sum())},
    )


def _bin_volumes(sample: Sample, edges: np.ndarray, Q: float | None, P: float | None
                 ) -> np.ndarray:
    """V_k: density-weighted volume over which each bin is visible, weighted by its fraction."""
    sel = sample.selection
    step = 8
    z = sel._z[::step]
    lo, hi = sample.limits_from_g(sample.g_nodes(Q)[::step])
    lo_c = np.clip(lo[:, None], edges[None, :-1], edges[None, 1:])
    hi_c = np.clip(hi[:, None], edges[None, :-1], edges[None, 1:])
    fraction = (hi_c - lo_c) / np.diff(edges)[None, :]
    P = sel.evolution.P if P is None else P
    weight = sel._dv_dlnz[::step] * 10.0 ** (0.4 * P * z)
    return integrate.simpson(weight[:, None] * fraction, x=sel._ln_z[::step], axis=0)


def _covariance(overlaps: _Overlaps, phi: np.ndarray, w: np.ndarray, counts: np.ndarray,
                occupied: np.ndarray, volume: np.ndarray) -> np.ndarray:
    """Inverse of the information matrix bordered by the count constraint (occupied bins)."""
    width = overlaps.width
    d = overlaps.d(phi)
    m = np.zeros((overlaps.k, overlaps.k))
    u = w / d**2
    for start in range(0, d.size, _CHUNK):
        rows = slice(start, start + _CHUNK)
        h = overlaps.dense(rows) * width[None, :]
        m += h.T @ (h * u[rows, None])
    sel = np.flatnonzero(occupied)
    info = np.diag(counts[sel] / phi[sel] ** 2) - m[np.ix_(sel, sel)]
    grad = width[sel] * volume[sel]
    size = sel.size
    bordered = np.zeros((size + 1, size + 1))
    bordered[:size, :size] = info
    bordered[:size, size] = bordered[size, :size] = grad
    try:
        inverse = np.linalg.inv(bordered)
    except np.linalg.LinAlgError as exc:
        raise LuminosityFunctionFitError(f"SWML: the information matrix is singular ({exc})"
                                         ) from None
    cov = inverse[:size, :size]
    cov = 0.5 * (cov + cov.T)
    if not (np.all(np.isfinite(cov)) and np.all(np.diag(cov) >= -1e-12 * np.abs(cov).max())):
        raise LuminosityFunctionFitError("SWML: the covariance is not positive")
    return cov
