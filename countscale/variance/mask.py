"""Mask power spectra and the variance of a footprint's mean surface density.

For a footprint with coverage w(n) (1 inside, 0 outside, fractions at edges) and a population
whose surface-density contrast has angular power spectrum C_ell, the mean contrast over the
footprint has variance

    sigma^2 = sum_ell (2 ell + 1) C_ell W_ell / Omega^2,

where W_ell = sum_m |w_lm|^2 / (2 ell + 1) is the mask's power spectrum (healpy ``anafast``
convention) and Omega = integral w dOmega its solid angle [sr]. For the full sky W_ell = 4 pi
at ell = 0 and 0 otherwise, so sigma^2 = C_0 / (4 pi).

Topics
------
MaskSpectrum
    W_ell at a set of multipoles with their weights in the sum; ``variance(cl)``.
footprint_mask_spectrum
    W_ell of a :class:`countscale.footprint.Footprint` from its coverage-fraction map.
cap_mask_spectrum
    W_ell of a circular field in closed form (Legendre polynomials).
rectangle_mask_spectrum
    W_ell of a small rectangular field in the flat-sky limit.
box_mask_spectrum
    W_ell of an RA/Dec box on the equator, through healpy (any size).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import healpy as hp
import numpy as np
from scipy import special

from countscale._checks import check_real
from countscale._checks import read_only as _read_only
from countscale.errors import InputError, InputTypeError

__all__ = [
    "FULL_SKY_DEG2",
    "MaskSpectrum",
    "box_mask_spectrum",
    "cap_mask_spectrum",
    "choose_nside",
    "footprint_mask_spectrum",
    "rectangle_mask_spectrum",
]

FULL_SKY_DEG2 = 4.0 * math.pi * (180.0 / math.pi) ** 2
_DEG2_PER_SR = (180.0 / math.pi) ** 2

#: Coverage-map pixels a footprint should span for its W_ell (see ``choose_nside``): with
#: ~1000 the variance of the demo footprint's mean moved by 0.05 % from nside 256 to 2048.
_MIN_PIXELS = 1000
_NSIDE_RANGE = (64, 2048)

#: A circular field's W_ell is summed to this many times the multipole of its radius,
#: 1 / theta: beyond, W_ell falls as ell^-3 and the sum's tail is below ~1e-3 for C_ell
#: falling as ell^-1 or faster.
_CAP_LMAX_FACTOR = 40.0
_LMAX_CAP = 200_000

#: Caps smaller than this radius [deg] use the flat-sky disc formula (see cap_mask_spectrum).
_SMALL_CAP_DEG = 1.0


@dataclass(frozen=True, eq=False)
class MaskSpectrum:
    """A mask's power spectrum, sampled where the variance sum needs it.

    Attributes
    ----------
    ell : ndarray
        Multipoles (integers for exact sums, real nodes for quadratures).
    weight : ndarray
        Each multipole's weight in the sum: 2 ell + 1 for an exact sum over integers; the
        quadrature weight of 2 ell d ell otherwise.
    w_ell : ndarray
        W_ell at ``ell``.
    area_sr : float
        The mask's solid angle Omega.
    method : str
        How W_ell was obtained (goes into results).
    """

    ell: np.ndarray
    weight: np.ndarray
    w_ell: np.ndarray
    area_sr: float
    method: str

    @property
    def area_deg2(self):
        return self.area_sr * _DEG2_PER_SR

    @property
    def lmax(self):
        return float(self.ell[-1])

    def variance(self, cl):
        """Variance of the mean contrast over the mask for the spectrum ``cl``.

        Parameters
        ----------
        cl : callable or array_like
            ``cl(ell) -> C_ell`` (e.g. an :class:`~countscale.variance.angular.
            AngularSpectrum`), or C_0 .. C_L indexed by integer multipole (0 beyond L).

        Returns
        -------
        float
            sigma^2 = sum weight C_ell W_ell / Omega^2.
        """
        if callable(cl):
            values = np.asarray(cl(self.ell), dtype=float)
        else:
            table = np.asarray(cl, dtype=float)
            if table.ndim != 1:
                raise InputError(f"`cl` must be 1-D; got shape {table.shape}")
            if not np.all(self.ell == np.round(self.ell)):
                raise InputError("`cl` as an array needs integer multipoles; this mask "
                                 f"spectrum ({self.method}) is sampled at real ones: pass a "
                                 "callable")
            index = self.ell.astype(np.int64)
            values = np.where(index < table.size, table[np.minimum(index, table.size - 1)], 0.0)
        if not np.all(np.isfinite(values) & (values >= 0)):
            raise InputError("`cl` must be finite and >= 0 at every multipole")
        return float(np.sum(self.weight * values * self.w_ell)) / self.area_sr**2

    def sigma(self, cl):
        """Fractional rms of the mean surface density: sqrt(variance)."""
        return math.sqrt(self.variance(cl))


def choose_nside(area_deg2, min_pixels=_MIN_PIXELS):
    """Smallest HEALPix nside (a power of 2 in [64, 2048]) giving a mask >= min_pixels pixels."""
    area_deg2 = check_real(area_deg2, "area_deg2", 0.0)
    nside = _NSIDE_RANGE[0]
    while nside < _NSIDE_RANGE[1] and area_deg2 / hp.nside2pixarea(nside, degrees=True) < \
            min_pixels:
        nside *= 2
    return nside


def _integer_spectrum(w_ell, area_sr, method):
    ell = np.arange(w_ell.size, dtype=float)
    return MaskSpectrum(_read_only(ell), _read_only(2.0 * ell + 1.0), _read_only(w_ell),
                        float(area_sr), method)


def footprint_mask_spectrum(footprint, nside=None, lmax=None):
    """W_ell of a footprint from its coverage-fraction map (healpy ``anafast``).

    Parameters
    ----------
    footprint : countscale.footprint.Footprint
    nside : int, optional
        Resolution of the coverage map; default :func:`choose_nside` of the area (the map's
        pixels hold exact covered fractions, so holes smaller than a pixel lower its value
        instead of vanishing).
    lmax : int, optional
        Largest multipole; default 2 nside.

    Returns
    -------
    MaskSpectrum

    Notes
    -----
    The coverage fractions are the mask averaged over each pixel, so the map's spectrum is
    W_ell times the pixel window, which is near 1 up to ell ~ nside. The variance sum is
    dominated by multipoles below the inverse size of the footprint, which the default nside
    puts well under nside; ``anafast`` runs without iterations (``iter=0``), which changed
    the demo footprint's variance by 3e-6 relative to three iterations.
    """
    from countscale.footprint import Footprint

    if not isinstance(footprint, Footprint):
        raise InputTypeError(f"`footprint` must be a Footprint; got {type(footprint).__name__}")
    area_sr = float(footprint.area_sr)
    if not area_sr > 0:
        raise InputError("`footprint` is empty (area 0): its mean density has no variance")
    if nside is None:
        nside = choose_nside(area_sr * _DEG2_PER_SR)
    elif isinstance(nside, bool) or not isinstance(nside, int | np.integer) or nside < 1 \
            or nside & (nside - 1):
        raise InputError(f"`nside` must be a power of 2; got {nside!r}")
    if lmax is None:
        lmax = 2 * int(nside)
    elif isinstance(lmax, bool) or not isinstance(lmax, int | np.integer) or not \
            0 <= lmax <= 3 * nside - 1:
        raise InputError(f"`lmax` must be an integer in [0, {3 * nside - 1}]; got {lmax!r}")
    coverage = footprint.to_healpix(int(nside))
    w_ell = hp.anafast(coverage, lmax=int(lmax), iter=0)
    return _integer_spectrum(w_ell, area_sr,
                             f"coverage map at nside {nside} (healpy anafast), ell <= {lmax}")


def _cap_area_to_cos(area_deg2=None, radius_deg=None):
    if (area_deg2 is None) == (radius_deg is None):
        raise InputError("give exactly one of `area_deg2` and `radius_deg`")
    if area_deg2 is not None:
        area_deg2 = check_real(area_deg2, "area_deg2", 0.0, FULL_SKY_DEG2)
        x0 = 1.0 - area_deg2 / _DEG2_PER_SR / (2.0 * math.pi)
        return max(x0, -1.0)
    radius_deg = check_real(radius_deg, "radius_deg", 0.0, 180.0)
    return math.cos(math.radians(radius_deg))


def _legendre_upto(x, lmax):
    """P_0(x) .. P_lmax(x) by Bonnet's recurrence (stable for |x| <= 1)."""
    p = np.empty(lmax + 1)
    p[0] = 1.0
    if lmax >= 1:
        p[1] = x
    for ell in range(2, lmax + 1):
        p[ell] = ((2 * ell - 1) * x * p[ell - 1] - (ell - 1) * p[ell - 2]) / ell
    return p


def cap_mask_spectrum(area_deg2=None, radius_deg=None, lmax=None, exact=False):
    """W_ell of a circular field (spherical cap) in closed form.

    Parameters
    ----------
    area_deg2, radius_deg : float
        The cap's area or angular radius (give one).
    lmax : int, optional
        Default 40 / theta (theta the radius in radians), at most 200 000.
    exact : bool
        Always use the Legendre closed form; by default caps smaller than 1 degree in
        radius use the flat-sky disc (Bessel J1), which agrees to better than 1e-3 there
        (checked in the tests) and is vectorised.

    Notes
    -----
    A cap of radius theta about the pole, x0 = cos theta, has only m = 0 coefficients,
    w_l0 = sqrt(4 pi (2 ell + 1)) / 2 integral_x0^1 P_ell(x) dx, and
    integral_x0^1 P_ell dx = [P_(ell-1)(x0) - P_(ell+1)(x0)] / (2 ell + 1) for ell >= 1
    (from (2 ell + 1) P_ell = P'_(ell+1) - P'_(ell-1); Abramowitz & Stegun 1964, 8.5.3,
    from memory). So W_ell = pi [P_(ell-1)(x0) - P_(ell+1)(x0)]^2 / (2 ell + 1)^2 and
    W_0 = pi (1 - x0)^2 = Omega^2 / (4 pi).
    """
    x0 = _cap_area_to_cos(area_deg2, radius_deg)
    theta = math.acos(x0)
    if lmax is None:
        lmax = int(min(max(_CAP_LMAX_FACTOR / max(theta, 1e-12), 50), _LMAX_CAP))
    elif isinstance(lmax, bool) or not isinstance(lmax, int | np.integer) or lmax < 0:
        raise InputError(f"`lmax` must be an integer >= 0; got {lmax!r}")
    if not isinstance(exact, bool):
        raise InputTypeError(f"`exact` must be True or False; got {exact!r}")
    area_sr = 2.0 * math.pi * (1.0 - x0)
    ell = np.arange(int(lmax) + 1)
    if not exact and theta < math.radians(_SMALL_CAP_DEG):
        # Small caps: the flat-sky disc, |W(l)|^2 = A^2 [2 J1(l theta) / (l theta)]^2 with
        # l = ell + 1/2 (W_ell = |W(l)|^2 / 4 pi, as for rectangles); vectorised, where the
        # recurrence would take lmax ~ 40 / theta steps.
        x = (ell + 0.5) * theta
        w = area_sr**2 / (4.0 * math.pi) * (2.0 * special.j1(x) / x) ** 2
        method = "flat-sky disc"
    else:
        p = _legendre_upto(x0, int(lmax) + 1)
        w = np.empty(ell.size)
        w[0] = math.pi * (1.0 - x0) ** 2
        if lmax >= 1:
            w[1:] = math.pi * (p[:-2] - p[2:])[: lmax] ** 2 / (2.0 * ell[1:] + 1.0) ** 2
        method = "closed form"
    return _integer_spectrum(w, area_sr, f"circular field of {area_sr * _DEG2_PER_SR:.4g} deg² "
                                         f"({method})")


def rectangle_mask_spectrum(width_deg, height_deg, n_nodes=400, n_phi=512):
    """W_ell of a rectangular field in the flat-sky limit (fields much smaller than a radian).

    Parameters
    ----------
    width_deg, height_deg : float
        Side lengths [deg] (on the sky).
    n_nodes, n_phi : int
        Log-spaced multipole nodes and azimuth nodes of the quadrature.

    Notes
    -----
    In the flat-sky limit the window's Fourier transform is W(l) = A sinc(l_x a / 2)
    sinc(l_y b / 2) and the variance of the mean is integral d^2 l / (2 pi)^2 C_l |W|^2 /
    A^2; matching it to the spherical sum gives W_ell = <|W(l)|^2>_phi / (4 pi) with the
    azimuthal mean taken by Gauss-Legendre quadrature (W_0 = A^2 / (4 pi), as on the
    sphere). The flat wavenumber l stands for ell + 1/2, and the integral runs from l = 1/2
    to 60 / min(a, b) on log-spaced nodes.
    """
    a = math.radians(check_real(width_deg, "width_deg", 0.0, 60.0))
    b = math.radians(check_real(height_deg, "height_deg", 0.0, 60.0))
    area = a * b
    lmax = 60.0 / min(a, b)
    # Flat-sky wavenumber l = ell + 1/2 (the spherical sum over ell of (2 ell + 1) f(ell) is
    # the integral of 2 l f dl with l = ell + 1/2), on log-spaced nodes from l = 1/2.
    log_l = np.linspace(math.log(0.5), math.log(lmax + 0.5), int(n_nodes))
    step = log_l[1] - log_l[0]
    flat = np.exp(log_l)
    ell = flat - 0.5
    # Trapezoid in ln l of 2 l^2 C W d ln l.
    weight = 2.0 * flat * flat * step
    weight[[0, -1]] *= 0.5
    nodes, phi_weights = special.roots_legendre(int(n_phi))
    phi = 0.25 * math.pi * (nodes + 1.0)
    phi_weights = phi_weights / phi_weights.sum()
    lx = flat[:, None] * np.cos(phi)[None, :]
    ly = flat[:, None] * np.sin(phi)[None, :]
    window2 = (area * np.sinc(lx * a / (2.0 * math.pi)) * np.sinc(ly * b / (2.0 * math.pi))) ** 2
    w_ell = window2 @ phi_weights / (4.0 * math.pi)
    return MaskSpectrum(_read_only(ell), _read_only(weight), _read_only(w_ell), area,
                        f"{width_deg:.3g}° × {height_deg:.3g}° field (flat sky)")


def box_mask_spectrum(width_deg, height_deg, nside=None):
    """W_ell of an RA/Dec box centred on the equator (healpy), for fields of any size.

    ``width_deg`` is the RA span (at most 360), ``height_deg`` the Dec span (at most 180).
    """
    from countscale.footprint import Footprint

    width = check_real(width_deg, "width_deg", 0.0, 360.0)
    height = check_real(height_deg, "height_deg", 0.0, 180.0)
    ra_range = (360.0 - 0.5 * width, 0.5 * width) if width < 360.0 else (0.0, 360.0)
    if nside is None:
        # At least 6 pixels across the short side.
        pixel_deg = min(width, height) / 6.0
        nside = 64
        while nside < _NSIDE_RANGE[1] and math.degrees(hp.nside2resol(nside)) > pixel_deg:
            nside *= 2
    # Boundary cells 16 times finer than the map's pixels carry exact covered fractions.
    order = min(round(math.log2(nside)) + 4, 12)
    box = Footprint.box(ra_range, (-0.5 * height, 0.5 * height), max_order=order)
    spectrum = footprint_mask_spectrum(box, nside=nside)
    return MaskSpectrum(spectrum.ell, spectrum.weight, spectrum.w_ell, spectrum.area_sr,
                        f"{width:.3g}° × {height:.3g}° box ({spectrum.method})")
