"""Galactic extinction: an E(B−V) HEALPix map, band coefficients, dereddening per source.

Dust in our Galaxy dims every source behind it by A = R · E(B−V) magnitudes, where E(B−V) is
the reddening toward the source (from a map the user supplies: any nside, RING or NEST) and R
the band's extinction per unit reddening. countscale dereddens each source's magnitude in the
tally (m₀ = m − A at the source's pixel) and moves the completeness limit of each part of the
footprint by the same A (a source of dereddened magnitude m₀ was detected as m₀ + A), so counts
in dereddened magnitudes are complete to a brighter limit where there is more dust.

Topics
------
ExtinctionMap
    The map and the band coefficient: ``ebv_at``, ``extinction_at`` (A in mag),
    ``check_covers`` (no missing value inside a footprint), ``at_cells`` (values at HEALPix
    cell centres), ``read``.
COEFFICIENTS, coefficient
    A table of common band coefficients R = A_band / E(B−V) with their published source.
dereddened_depth
    A per-pixel m50 map in dereddened magnitudes (the completeness limit shifted by A).

Conventions
-----------
Values are taken at the HEALPix pixel holding the position (no interpolation). A pixel without
data (NaN, or ``healpy.UNSEEN``, or absent from a partial map) inside the footprint is an error:
the extinction there is unknown, and a silent zero would bias every count. The map is a
foreground screen: every source is taken to lie behind all of the dust, which is right for
galaxies and for distant stars and overcorrects nearby stars.

Examples
--------
>>> import numpy as np
>>> ext = ExtinctionMap(np.full(12, 0.05), coefficient=coefficient("sdss_r"))
>>> round(float(ext.extinction_at([10.0], [20.0])[0]), 5)
0.11425
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import healpy as hp
import numpy as np

from countscale.errors import InputError, InputTypeError

__all__ = ["COEFFICIENTS", "ExtinctionMap", "coefficient", "dereddened_depth"]

#: A_band / E(B−V) for an R_V = 3.1 Fitzpatrick (1999) reddening law, per unit of the
#: reddening of the Schlegel, Finkbeiner & Davis (1998, ApJ 500, 525) maps, from Schlafly &
#: Finkbeiner 2011, ApJ 737, 103, Table 6. Values from memory (the SDSS, PS1 and DECam rows
#: agree with the values commonly quoted alongside that table); check the last digit against
#: the paper before relying on it. The table includes the 14 % recalibration of those maps, so
#: use these coefficients with reddening on that scale.
COEFFICIENTS = {
    "sdss_u": 4.239, "sdss_g": 3.303, "sdss_r": 2.285, "sdss_i": 1.698, "sdss_z": 1.263,
    "ps1_g": 3.172, "ps1_r": 2.271, "ps1_i": 1.682, "ps1_z": 1.322, "ps1_y": 1.087,
    "decam_u": 3.995, "decam_g": 3.214, "decam_r": 2.165, "decam_i": 1.592, "decam_z": 1.211,
    "decam_y": 1.064,
    "landolt_b": 3.626, "landolt_v": 2.742, "landolt_r": 2.169, "landolt_i": 1.505,
    "ukirt_j": 0.709, "ukirt_h": 0.449, "ukirt_k": 0.302,
}

#: The published source of :data:`COEFFICIENTS`, for reports.
COEFFICIENT_SOURCE = ("Schlafly & Finkbeiner 2011, ApJ 737, 103, Table 6 (R_V = 3.1; "
                      "from memory)")


def coefficient(band: str) -> float:
    """R = A_band / E(B−V) of a band in :data:`COEFFICIENTS` (case-insensitive name).

    Raises
    ------
    InputError
        An unknown band; the message lists the known ones.
    """
    if not isinstance(band, str):
        raise InputTypeError(f"`band` must be a band name such as 'sdss_r'; got {band!r}")
    key = band.strip().lower()
    if key not in COEFFICIENTS:
        raise InputError(
            f"`band` must be one of {', '.join(COEFFICIENTS)}; got {band!r} (or give the "
            "coefficient R itself)"
        )
    return COEFFICIENTS[key]


def _check_coefficient(value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float | np.number):
        raise InputTypeError(f"`coefficient` R must be a number > 0; got {value!r}")
    value = float(value)
    if not (math.isfinite(value) and value > 0.0):
        raise InputError(f"`coefficient` R must be a finite number > 0; got {value!r}")
    return value


def _full_sky_values(values: Any, name: str) -> np.ndarray:
    try:
        array = np.array(values, dtype=float, copy=True)
    except (TypeError, ValueError) as exc:
        raise InputTypeError(f"`{name}` must be a numeric HEALPix map; got "
                             f"{type(values).__name__}") from exc
    if array.ndim != 1 or not hp.isnpixok(array.size):
        raise InputError(
            f"`{name}` must be a HEALPix map of 12 nside**2 pixels; got {array.size} values"
            f" (shape {array.shape})"
        )
    array[hp.mask_bad(array)] = np.nan
    return array


@dataclass(frozen=True, eq=False)
class ExtinctionMap:
    """An E(B−V) map and the band's coefficient R (A = R · E(B−V)).

    Parameters
    ----------
    ebv : array_like of float, shape (12 nside²,)
        Reddening per pixel (mag); NaN or ``healpy.UNSEEN`` where there is no data.
    coefficient : float
        R = A_band / E(B−V), > 0 (see :data:`COEFFICIENTS`).
    nest : bool
        Pixel ordering of ``ebv``.
    band : str, optional
        The band's name, for reports.
    path : str, optional
        Where the map was read from, for messages.

    Raises
    ------
    InputError
        A map whose length is not 12 nside², a negative or infinite reddening, R <= 0.
    """

    ebv: np.ndarray
    coefficient: float
    nest: bool = False
    band: str | None = None
    path: str | None = None

    def __post_init__(self) -> None:
        label = f"extinction map '{self.path}'" if self.path else "ebv"
        values = _full_sky_values(self.ebv, "ebv" if self.path is None else label)
        finite = values[np.isfinite(values)]
        if np.isinf(values).any():
            raise InputError(f"`{label}` values must be finite or NaN (no data); got inf")
        if finite.size and finite.min() < 0.0:
            raise InputError(f"`{label}` E(B-V) must be >= 0; got {finite.min():g}")
        values.setflags(write=False)
        object.__setattr__(self, "ebv", values)
        object.__setattr__(self, "coefficient", _check_coefficient(self.coefficient))
        if not isinstance(self.nest, bool | np.bool_):
            raise InputTypeError(f"`nest` must be True or False; got {self.nest!r}")
        object.__setattr__(self, "nest", bool(self.nest))

    @classmethod
    def read(cls, path: str | os.PathLike, *, coefficient: float | None = None,
             band: str | None = None, nest: bool | None = None) -> ExtinctionMap:
        """Read an E(B−V) HEALPix FITS map (first column; full-sky or partial, RING or NEST).

        Give the band's ``coefficient`` R, or a ``band`` of :data:`COEFFICIENTS`; ``nest``
        overrides the file's ORDERING keyword.
        """
        from countscale.footprint import _read_healpix_fits

        if not isinstance(path, str | os.PathLike):
            raise InputTypeError(f"`path` must be a file path; got {type(path).__name__}")
        if coefficient is None and band is None:
            raise InputError("`coefficient` or `band` is needed to turn E(B-V) into extinction")
        r_value = coefficient if coefficient is not None else _coefficient_of(band)
        values, pixels, nside, is_nest = _read_healpix_fits(Path(path), nest)
        if pixels is not None:
            full = np.full(12 * nside * nside, np.nan)
            if pixels.size and (pixels.min() < 0 or pixels.max() >= full.size):
                raise InputError(f"{path}: PIXEL values must be in [0, {full.size}); got "
                                 f"{int(pixels.min())}..{int(pixels.max())}")
            full[pixels] = values
            values = full
        return cls(values, r_value, nest=is_nest, band=band, path=os.fspath(path))

    # -- lookups -------------------------------------------------------------------------------

    @property
    def nside(self) -> int:
        return int(hp.npix2nside(self.ebv.size))

    def _pixels(self, ra: Any, dec: Any) -> np.ndarray:
        return hp.ang2pix(self.nside, np.asarray(ra, float), np.asarray(dec, float),
                          nest=self.nest, lonlat=True)

    def ebv_at(self, ra: Any, dec: Any) -> np.ndarray:
        """E(B−V) at each position (degrees); NaN where the map has no data."""
        return self.ebv[self._pixels(ra, dec)]

    def extinction_at(self, ra: Any, dec: Any) -> np.ndarray:
        """A = R · E(B−V) in magnitudes at each position; NaN where the map has no data."""
        return self.coefficient * self.ebv_at(ra, dec)

    def at_cells(self, order: int, cells: np.ndarray) -> np.ndarray:
        """E(B−V) at the centres of NEST ``cells`` of HEALPix ``order``."""
        x, y, z = hp.pix2vec(2**order, np.asarray(cells, dtype=np.int64), nest=True)
        return self.ebv[hp.vec2pix(self.nside, x, y, z, nest=self.nest)]

    def check_covers(self, footprint: Any, where: str = "extinction map") -> None:
        """Raise unless the map has a value at every pixel the footprint touches.

        Raises
        ------
        InputError
            ``"<where>: E(B-V) is missing (NaN) in 3 pixels inside the footprint, e.g. pixel
            1234 (nside 64, RING) at RA 161.2, Dec 43.1"``.
        """
        order = round(math.log2(self.nside))
        cells, _ = footprint.coverage_cells(order)
        pixels = cells if self.nest else hp.nest2ring(self.nside, cells)
        bad = pixels[np.isnan(self.ebv[pixels])]
        if bad.size:
            ra, dec = hp.pix2ang(self.nside, int(bad[0]), nest=self.nest, lonlat=True)
            raise InputError(
                f"{where}: E(B-V) is missing (NaN) in {bad.size} pixel(s) inside the footprint, "
                f"e.g. pixel {int(bad[0])} (nside {self.nside}, "
                f"{'NEST' if self.nest else 'RING'}) at RA {float(ra):.4f}, Dec {float(dec):.4f}"
            )

    def summary(self, footprint: Any) -> dict:
        """JSON-ready description: source, R, and E(B−V) and A over the footprint's pixels."""
        order = round(math.log2(self.nside))
        cells, fraction = footprint.coverage_cells(order)
        pixels = cells if self.nest else hp.nest2ring(self.nside, cells)
        ebv = self.ebv[pixels]
        weights = fraction / fraction.sum() if fraction.sum() > 0 else fraction
        return {
            "path": self.path,
            "nside": self.nside,
            "band": self.band,
            "coefficient": self.coefficient,
            "coefficient_source": COEFFICIENT_SOURCE if self.band else "given in the run file",
            "ebv_min": float(np.nanmin(ebv)) if ebv.size else None,
            "ebv_mean": float(np.nansum(ebv * weights)) if ebv.size else None,
            "ebv_max": float(np.nanmax(ebv)) if ebv.size else None,
            "extinction_mean_mag": (float(self.coefficient * np.nansum(ebv * weights))
                                    if ebv.size else None),
            "extinction_max_mag": float(self.coefficient * np.nanmax(ebv)) if ebv.size else None,
        }


def _coefficient_of(band: Any) -> float:
    return coefficient(band)


#: Finest nside of the dereddened depth map built for completeness (a full-sky float map of
#: nside 512 holds 3.1 million pixels, 25 MB; finer maps cost memory for little gain, since
#: the completeness limit is only needed per region). Choice of this project.
DEPTH_NSIDE_MAX = 512


def dereddened_depth(depth: Any, shape: Any, extinction: ExtinctionMap, footprint: Any) -> Any:
    """The completeness limit in dereddened magnitudes: m50 − A per pixel.

    A source of dereddened magnitude m₀ is seen as m₀ + A, so where the extinction is A the
    completeness in dereddened magnitudes is ``c(m₀ + A)``: the m50 limit moves brighter by A.

    Parameters
    ----------
    depth : countscale.completeness.DepthMap or None
        The observed-magnitude depth map; None for one curve everywhere (``shape``'s m50).
    shape : completeness model or fit
        The curve (with its own m50 when ``depth`` is None).
    extinction : ExtinctionMap
    footprint : countscale.footprint.Footprint
        Only its pixels matter; the map is NaN (no data) elsewhere.

    Returns
    -------
    countscale.completeness.DepthMap
        At the finer of the two maps' nside (at most :data:`DEPTH_NSIDE_MAX`), NEST ordering.
    """
    from countscale.completeness import DepthMap, _as_shape_model

    nside = extinction.nside if depth is None else max(depth.nside, extinction.nside)
    nside = min(nside, DEPTH_NSIDE_MAX)
    order = round(math.log2(nside))
    cells, _ = footprint.coverage_cells(order)
    if depth is None:
        m50 = np.full(cells.size, float(_as_shape_model(shape).m50))
    else:
        x, y, z = hp.pix2vec(nside, cells, nest=True)
        m50 = depth.m50_mag[hp.vec2pix(depth.nside, x, y, z, nest=depth.nest)]
    values = np.full(12 * nside * nside, np.nan)
    values[cells] = m50 - extinction.coefficient * extinction.at_cells(order, cells)
    return DepthMap(values, shape=shape if depth is None else depth.shape, nest=True)
