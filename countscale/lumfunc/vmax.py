"""The 1/Vmax estimator (Schmidt 1968, ApJ 151, 393).

phi_k = (1 / Delta_k) sum over galaxies i in bin k of w_i / V_max,i, V_max,i being the
(density-weighted) comoving volume over which galaxy i would be in the sample. For a sample
drawn uniformly in space the sum's expectation is the integral of phi over the visible part
of the bin, with no assumption on the form. It is biased where the density of galaxies is not
uniform along the line of sight (a wall or void at some redshift moves every bin whose V_max
reaches it; STY and SWML, conditional on redshift, are not moved), and it does not estimate the
part of a bin that no galaxy could occupy (flagged ``complete = False``).

Errors: Poisson, sqrt(sum w_i^2 / V_max,i^2) / Delta_k; and the jackknife over the footprint's
regions when there are at least three (drop one region, rescale by the solid angle kept),
which holds the cosmic variance too. ``phi_err`` is the jackknife error when there is one, else
Poisson.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from countscale.lumfunc.binned import BinnedFunction, bin_edges
from countscale.lumfunc.selection import Sample

__all__ = ["vmax_estimate"]


def vmax_estimate(sample: Sample, edges: Any = None, width: float | None = None,
                  Q: float | None = None, P: float | None = None) -> BinnedFunction:
    """1/Vmax luminosity or mass function of a :class:`Sample`.

    Parameters
    ----------
    sample : Sample
    edges : array_like, optional
        Bin edges in x; default bins of ``width`` covering the sample.
    width : float, optional
        Default 0.25 mag or 0.1 dex.
    Q, P : float, optional
        Evolution to use (default: the selection's).

    Returns
    -------
    BinnedFunction
        ``extra`` holds ``phi_err_poisson``, ``phi_err_jackknife`` (or None) and
        ``n_outside_bins``.
    """
    if not isinstance(sample, Sample):
        from countscale.errors import InputTypeError

        raise InputTypeError(f"`sample` must be a lumfunc Sample; got {type(sample).__name__}")
    x = sample.x(Q)
    if width is None and edges is None:
        width = 0.25 if sample.quantity == "luminosity" else 0.1
    e = bin_edges(x, width, edges)
    k = e.size - 1
    vmax = sample.vmax(Q, P)
    slot = np.searchsorted(e, x, side="right") - 1
    inside = (slot >= 0) & (slot < k)
    slot_in = slot[inside]
    w = sample.weight[inside]
    inv = w / vmax[inside]
    width_k = np.diff(e)
    n = np.bincount(slot_in, minlength=k)
    phi = np.bincount(slot_in, weights=inv, minlength=k) / width_k
    poisson = np.sqrt(np.bincount(slot_in, weights=inv**2, minlength=k)) / width_k
    jackknife = _jackknife(sample, slot_in, inside, inv, k) / width_k \
        if _n_regions(sample) >= 3 else None
    x_lo, x_hi = sample.x_range(Q)
    complete = (e[:-1] >= x_lo) & (e[1:] <= x_hi)
    keep = n > 0
    err = jackknife if jackknife is not None else poisson
    extra: dict[str, Any] = {
        "phi_err_poisson": poisson[keep],
        "phi_err_jackknife": None if jackknife is None else jackknife[keep],
        "n_outside_bins": int((~inside).sum()),
    }
    return BinnedFunction(
        method="vmax", x_name=sample.x_name, edges=e, centre=0.5 * (e[:-1] + e[1:])[keep],
        lower=e[:-1][keep], upper=e[1:][keep], phi=phi[keep], phi_err=err[keep], n=n[keep],
        complete=complete[keep],
        error_kind=("jackknife over regions" if jackknife is not None else "Poisson"),
        extra=extra,
    )


def _n_regions(sample: Sample) -> int:
    if sample.region is None:
        return 0
    return int((sample.region_area_sr > 0).sum())


def _jackknife(sample: Sample, slot: np.ndarray, inside: np.ndarray, inv: np.ndarray,
               k: int) -> np.ndarray:
    """Jackknife error of sum w / Vmax per bin, over regions with area > 0."""
    areas = sample.region_area_sr
    region = sample.region[inside]
    n_reg = areas.size
    per = np.bincount(region * k + slot, weights=inv, minlength=n_reg * k).reshape(n_reg, k)
    used = areas > 0
    per, areas_used = per[used], areas[used]
    omega = float(areas_used.sum())
    total = per.sum(axis=0)
    kept = (total[None, :] - per) * (omega / (omega - areas_used))[:, None]
    m = kept.shape[0]
    return np.sqrt((m - 1) / m * ((kept - kept.mean(axis=0)) ** 2).sum(axis=0))
