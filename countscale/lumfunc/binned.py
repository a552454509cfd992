"""Binned estimates of a luminosity or mass function (1/Vmax, SWML) and their bins.

:class:`BinnedFunction` is the result both binned estimators return; :func:`bin_edges`
checks user bins or makes bins that cover a sample.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from countscale._checks import finite_scalar as _finite_scalar
from countscale._checks import real_array as _real_array
from countscale.errors import InputError

__all__ = ["BinnedFunction", "bin_edges"]


def bin_edges(x: np.ndarray | None = None, width: float | None = None,
              edges: Any = None) -> np.ndarray:
    """Bin edges: ``edges`` checked, or bins of ``width`` covering ``x`` (multiples of width).

    Parameters
    ----------
    x : ndarray, optional
        Values to cover (when ``edges`` is not given).
    width : float, optional
        Bin width (> 0) for the automatic bins.
    edges : array_like, optional
        Strictly increasing, finite, at least two.
    """
    if edges is not None:
        e = _real_array("edges", edges)
        if e.ndim != 1 or e.size < 2:
            raise InputError(f"`edges` must be 1-d with at least 2 values; got shape {e.shape}")
        if not np.isfinite(e).all() or not (np.diff(e) > 0).all():
            raise InputError(f"`edges` must be finite and strictly increasing; got {e!r:.80}")
        return e
    w = _finite_scalar("width", width)
    if not w > 0:
        raise InputError(f"`width` must be > 0; got {w!r}")
    lo = math.floor(float(np.min(x)) / w) * w
    hi = math.ceil(float(np.max(x)) / w) * w
    if hi <= float(np.max(x)):
        hi += w
    n = round((hi - lo) / w)
    return lo + w * np.arange(n + 1)


@dataclass(frozen=True, eq=False)
class BinnedFunction:
    """A binned luminosity or mass function.

    Attributes
    ----------
    method : {"vmax", "swml"}
    x_name : {"mag", "log10_mass"}
    edges : ndarray, shape (k + 1,)
        Edges of the bins reported (bins without a galaxy are left out; see ``centre``).
    centre : ndarray, shape (m,)
        Centres of the bins reported (those holding at least one galaxy).
    lower, upper : ndarray, shape (m,)
        Their edges.
    phi : ndarray, shape (m,)
        Number density per Mpc^3 per unit x (mag or dex), averaged over the bin.
    phi_err : ndarray, shape (m,)
        1-sigma error (see ``error_kind``).
    n : ndarray of int, shape (m,)
        Galaxies in each bin.
    complete : ndarray of bool, shape (m,)
        Whether every x of the bin is visible somewhere in the redshift range; where not,
        the part of the bin no galaxy could occupy is not estimated (1/Vmax then averages
        over the visible part only).
    error_kind : str
        How ``phi_err`` was obtained.
    extra : dict
        Method-specific arrays (``phi_err_poisson``, ``phi_err_jackknife``, ``covariance``).
    """

    method: str
    x_name: str
    edges: np.ndarray
    centre: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    phi: np.ndarray
    phi_err: np.ndarray
    n: np.ndarray
    complete: np.ndarray
    error_kind: str
    extra: dict

    def to_json(self) -> dict[str, Any]:
        """``{x_name, "phi", "phi_err", "n", ...}`` with plain lists."""
        out: dict[str, Any] = {
            self.x_name: [float(v) for v in self.centre],
            "phi": [float(v) for v in self.phi],
            "phi_err": [float(v) for v in self.phi_err],
            "n": [int(v) for v in self.n],
            "bin_lower": [float(v) for v in self.lower],
            "bin_upper": [float(v) for v in self.upper],
            "complete": [bool(v) for v in self.complete],
            "error_kind": self.error_kind,
        }
        for name, value in self.extra.items():
            if isinstance(value, np.ndarray):
                out[name] = value.tolist()
            else:
                out[name] = value
        return out

    def __repr__(self) -> str:
        return (f"BinnedFunction({self.method}, {self.phi.size} bins of {self.x_name} "
                f"{self.lower[0]:g}..{self.upper[-1]:g}, {int(self.n.sum())} galaxies)")
