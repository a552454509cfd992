"""Figures from results (matplotlib, Agg backend). No science is computed here.

Topics
------
footprint_figure
    Whole-sky view of where a footprint lies, and a zoom that shows its edges and holes.
"""

from __future__ import annotations

import numpy as np

from countscale._io import atomic_path


def _pyplot():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def _unwrap_ra(ra_deg):
    """RA values made continuous around their circular mean (for boxes through RA 0)."""
    ang = np.radians(ra_deg)
    centre = np.degrees(np.arctan2(np.sin(ang).mean(), np.cos(ang).mean()))
    return centre + (ra_deg - centre + 180.0) % 360.0 - 180.0


def footprint_figure(footprint, path, title=None, zoom_pixels=700):
    """Write a two-panel PNG: the footprint on the whole sky, and a zoom on it.

    The zoom samples the coverage fraction on a regular RA/Dec grid of `zoom_pixels` across,
    so holes larger than a grid step show; its caption gives the step.
    """
    import healpy as hp

    plt = _pyplot()
    order = min(footprint.max_order, 7)
    cells, fraction = footprint.coverage_cells(order)
    ra_c, dec_c = hp.pix2ang(2**order, cells, nest=True, lonlat=True)
    fig = plt.figure(figsize=(12, 5.2))
    sky = fig.add_subplot(1, 2, 1, projection="mollweide")
    # Centre the view on the footprint, RA increasing to the left as on the sky.
    mean_ra = 180.0
    if len(ra_c):
        rad = np.radians(ra_c)
        mean_ra = np.degrees(np.arctan2(np.sin(rad).mean(), np.cos(rad).mean())) % 360
    x = np.radians((mean_ra - ra_c + 180.0) % 360.0 - 180.0)
    sky.scatter(x, np.radians(dec_c), s=2, c=fraction, cmap="viridis", vmin=0, vmax=1)
    if len(ra_c):
        sky.plot(0.0, np.radians(np.mean(dec_c)), marker="o", mfc="none", mec="red", ms=14,
                 mew=1.5)
    ticks = np.arange(-150, 151, 30)
    sky.set_xticks(np.radians(ticks))
    sky.set_xticklabels([f"{(mean_ra - t) % 360:.0f}°" for t in ticks], fontsize=7)
    sky.grid(True, alpha=0.4)
    sky.set_title(f"Whole sky (RA increasing to the left)\n{footprint.area_deg2:.4g} deg², "
                  f"sky fraction {footprint.sky_fraction:.3g}", fontsize=10)

    zoom = fig.add_subplot(1, 2, 2)
    if len(ra_c):
        ra_u = _unwrap_ra(ra_c)
        half = np.degrees(hp.max_pixrad(2**order))
        ra_lo, ra_hi = ra_u.min() - half, ra_u.max() + half
        dec_lo, dec_hi = max(dec_c.min() - half, -90.0), min(dec_c.max() + half, 90.0)
        cos_dec = max(np.cos(np.radians(0.5 * (dec_lo + dec_hi))), 0.05)
        aspect = (dec_hi - dec_lo) / max((ra_hi - ra_lo) * cos_dec, 1e-9)
        nx = zoom_pixels
        ny = int(np.clip(nx * aspect, 50, 2 * zoom_pixels))
        gra = np.linspace(ra_hi, ra_lo, nx)
        gdec = np.linspace(dec_lo, dec_hi, ny)
        mra, mdec = np.meshgrid(gra, gdec)
        cover = footprint.weight_at(mra.ravel() % 360.0, mdec.ravel()).reshape(mdec.shape)
        image = zoom.imshow(cover, origin="lower", extent=(ra_hi, ra_lo, dec_lo, dec_hi),
                            cmap="viridis", vmin=0, vmax=1, interpolation="nearest",
                            aspect=1.0 / cos_dec)
        fig.colorbar(image, ax=zoom, label="coverage fraction", shrink=0.85)
        step_arcsec = (ra_hi - ra_lo) * cos_dec / nx * 3600
        from matplotlib.ticker import FuncFormatter

        zoom.xaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v % 360:g}"))
        zoom.set_xlabel("RA [deg]")
        zoom.set_ylabel("Dec [deg]")
        cell_arcsec = np.degrees(np.sqrt(4 * np.pi / (12 * 4**footprint.max_order))) * 3600
        zoom.set_title(f"Zoom (grid step {step_arcsec:.3g}″; finest cells {cell_arcsec:.2g}″)",
                       fontsize=10)
    else:
        zoom.text(0.5, 0.5, "empty footprint", ha="center", va="center")
    if title:
        fig.suptitle(title)
    fig.tight_layout()
    with atomic_path(path, suffix=".png") as tmp:
        fig.savefig(tmp, dpi=110, format="png")
    plt.close(fig)
