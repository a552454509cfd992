"""Figures from results (matplotlib, Agg backend). No science is computed here.

Topics
------
footprint_figure
    Whole-sky view of where a footprint lies, and a zoom that shows its edges and holes.
completeness_figure, counts_figure
    The completeness curve; the number counts with their fits.
luminosity_function_figure
    1/Vmax, SWML and the STY curve on one plot, and the M*-alpha error ellipse.
sky_model_figure, contamination_figure
    The sky model (densities per unit, residuals, totals); stars among the sources per bin.
totals_figure, totals_budget_figure
    The run's totals with their intervals; their error budgets as stacked bars.

Each figure function writes its PNG and returns a list of notes: one sentence for each part
of the figure left empty and why (no bin complete enough to correct, ...), so that the report
can say it beside the figure. A figure with nothing to show is still drawn, with the reason
written on it.
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


def footprint_figure(footprint, path, title=None, zoom_pixels=700, depth=None):
    """Write the footprint figure: where it lies on the whole sky, and a zoom on it.

    The zoom samples the coverage fraction on a regular RA/Dec grid of `zoom_pixels` across,
    so holes larger than a grid step show; its caption gives the step. With `depth` (a
    :class:`countscale.completeness.DepthMap`), a second zoom shows the 50 % completeness
    magnitude across the footprint, holes and the outside left blank. Returns notes on what
    is left empty (see the module docstring).
    """
    import healpy as hp
    from matplotlib.ticker import FuncFormatter

    plt = _pyplot()
    order = min(footprint.max_order, 7)
    cells, fraction = footprint.coverage_cells(order)
    ra_c, dec_c = hp.pix2ang(2**order, cells, nest=True, lonlat=True)
    fig = plt.figure(figsize=(11, 9.6) if depth is not None else (12, 5.2))
    if depth is not None:
        grid = fig.add_gridspec(2, 2, height_ratios=[1, 1.05])
        sky = fig.add_subplot(grid[0, :], projection="mollweide")
        zooms = [fig.add_subplot(grid[1, 0]), fig.add_subplot(grid[1, 1])]
    else:
        sky = fig.add_subplot(1, 2, 1, projection="mollweide")
        zooms = [fig.add_subplot(1, 2, 2)]
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
    sky.set_title(f"Whole sky (RA increasing to the left; red circle: the footprint)\n"
                  f"{footprint.area_deg2:.4g} deg², sky fraction {footprint.sky_fraction:.3g}",
                  fontsize=10)

    notes = []
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
        extent = (ra_hi, ra_lo, dec_lo, dec_hi)
        step_arcsec = (ra_hi - ra_lo) * cos_dec / nx * 3600
        cell_arcsec = np.degrees(np.sqrt(4 * np.pi / (12 * 4**footprint.max_order))) * 3600
        zoom = zooms[0]
        image = zoom.imshow(cover, origin="lower", extent=extent, cmap="viridis", vmin=0,
                            vmax=1, interpolation="nearest", aspect=1.0 / cos_dec)
        fig.colorbar(image, ax=zoom, label="coverage fraction", shrink=0.85)
        zoom.set_title(f"Zoom: coverage and holes (grid step {step_arcsec:.3g}″; finest "
                       f"cells {cell_arcsec:.2g}″)", fontsize=10)
        if depth is not None:
            pixel = hp.ang2pix(depth.nside, mra.ravel() % 360.0, mdec.ravel(),
                               nest=depth.nest, lonlat=True)
            m50 = np.asarray(depth.m50_mag, dtype=float)[pixel].reshape(mdec.shape)
            m50 = np.where(cover > 0, m50, np.nan)
            cmap = plt.get_cmap("magma").with_extremes(bad="white")
            shown = np.isfinite(m50)
            if shown.any():
                image = zooms[1].imshow(np.ma.masked_invalid(m50), origin="lower",
                                        extent=extent, cmap=cmap, interpolation="nearest",
                                        aspect=1.0 / cos_dec)
                fig.colorbar(image, ax=zooms[1], label="m50: 50 % completeness [mag]",
                             shrink=0.85)
            else:
                notes.append("the depth map has no value inside the footprint")
            zooms[1].set_title("Zoom: depth (holes and outside blank)", fontsize=10)
        for zoom in zooms:
            zoom.xaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v % 360:g}"))
            zoom.set_xlabel("RA [deg]")
            zoom.set_ylabel("Dec [deg]")
    else:
        for zoom in zooms:
            zoom.text(0.5, 0.5, "empty footprint", ha="center", va="center")
        notes.append("the footprint is empty: there is nothing to draw")
    if title:
        fig.suptitle(title)
    fig.tight_layout(rect=(0, 0.02, 1, 0.96))
    _save(fig, path)
    return notes


def completeness_figure(completeness, path, title=None):
    """Completeness: recovered fraction of injections, the fitted curve and its band.

    Parameters
    ----------
    completeness : mapping
        The ``completeness`` block of ``results.json``.
    path : path
        PNG to write.

    Returns
    -------
    list of str
        Notes on parts of the figure left empty (none today: a fit needs injections).
    """
    plt = _pyplot()
    rec, curve = completeness["recovery"], completeness["curve"]
    mid = 0.5 * (np.asarray(rec["mag_lo"]) + np.asarray(rec["mag_hi"]))
    frac = np.asarray(rec["fraction"])
    err = np.abs(np.stack([frac - np.asarray(rec["interval_lo"]),
                           np.asarray(rec["interval_hi"]) - frac]))
    fig, ax = plt.subplots(figsize=(8, 5))
    mag = np.asarray(curve["mag"])
    ax.fill_between(mag, curve["band_lo"], curve["band_hi"], color="tab:blue", alpha=0.3,
                    lw=0, label="fit, 68 % band")
    ax.plot(mag, curve["completeness"], color="tab:blue", lw=1.5,
            label=f"{completeness['model']} fit")
    ax.errorbar(mid, frac, yerr=err, fmt="o", ms=3, color="k", lw=0.8,
                label=f"injections ({completeness['n_injections_fitted']:,d}), "
                      f"{int(100 * rec['confidence'])} % binomial")
    ax.plot(mag, curve["effective_area_fraction"], color="tab:orange", ls="--", lw=1.2,
            label="effective area / area (depth map applied)")
    m50, m90 = completeness["m50"], completeness["m90"]
    for est, name in ((m50, "m50"), (m90, "m90")):
        ax.axvline(est["median"], color="grey", ls=":", lw=1)
        ax.text(est["median"], 0.03, f" {name} = {est['median']:.3f}", rotation=90,
                va="bottom", ha="right", fontsize=8, color="grey")
    depth = completeness.get("depth_map")
    xlabel = "injected magnitude"
    if depth and depth.get("shifted_injections"):
        xlabel += f" (moved to the median depth, m50 = {depth['reference_m50']:.2f})"
    ax.set_xlabel(xlabel)
    ax.set_ylabel("completeness")
    ax.set_ylim(-0.02, 1.05)
    ax.grid(alpha=0.3)
    ax.legend(loc="lower left", fontsize=8)
    ax.set_title(title or "Detection completeness", fontsize=11)
    fig.tight_layout()
    _save(fig, path)
    return []


def counts_figure(counts, path, title=None):
    """Number counts: raw and corrected densities, fitted models, and fit residuals.

    Parameters
    ----------
    counts : mapping
        The ``counts`` block of ``results.json``.
    path : path
        PNG to write.

    Returns
    -------
    list of str
        Notes on parts left empty: no corrected densities when no bin with sources is at
        least 50 % complete, no points when no bin holds a source.
    """
    plt = _pyplot()
    diff = counts["differential"]
    lo, hi = np.asarray(diff["mag_lo"]), np.asarray(diff["mag_hi"])
    mid = 0.5 * (lo + hi)
    n_obs = np.asarray(diff["n_observed"], dtype=float)
    used = np.asarray(diff["used_in_fit"], dtype=bool)
    fig, (ax, res) = plt.subplots(2, 1, figsize=(8, 7), sharex=True,
                                  gridspec_kw={"height_ratios": [3, 1]})
    shown = n_obs > 0
    raw = np.asarray(diff["raw_density"])
    stars = diff.get("n_stars") is not None  # a star catalogue's stars subtracted
    ax.plot(mid[shown], raw[shown], "o", mfc="none", mec="grey", ms=4,
            label="raw (no correction" + ("; stars included)" if stars else ")"))
    corr = np.array([np.nan if v is None else v for v in diff["corrected_density"]])
    full = diff["corrected_interval_68_full"] or diff["corrected_interval_68"]
    band = np.array([[np.nan, np.nan] if v is None else v for v in full], dtype=float)
    # Corrected points only where at least half the sources are detected: deeper, the
    # correction is mostly the model's own extrapolation.
    ok = shown & np.isfinite(corr) & (np.asarray(diff["completeness"]) >= 0.5)
    notes = []
    if not shown.any():
        notes.append("no bin holds a source: there are no counts to show")
    elif not ok.any():
        notes.append("no bin with sources is at least 50 % complete, so no corrected "
                     "densities are shown (only raw counts and the fitted model)")
    if ok.any():
        yerr = np.abs(np.stack([corr - band[:, 0], band[:, 1] - corr]))[:, ok]
        error_kind = "Poisson + clustering" if diff["corrected_interval_68_full"] else "Poisson"
        ax.errorbar(mid[ok], corr[ok], yerr=yerr, fmt="o", ms=3.5, color="k", lw=0.9,
                    label=("galaxies (stars subtracted), " if stars else "")
                    + "corrected for completeness and scatter" + ("\n" if stars else " ")
                    + f"(68 %, {error_kind}; "
                          "shown where completeness ≥ 0.5)")
    if notes:
        import textwrap

        ax.text(0.5, 0.5, "\n".join(textwrap.fill(n, 60) for n in notes),
                transform=ax.transAxes, ha="center", va="center", fontsize=9, color="tab:red",
                bbox={"facecolor": "white", "edgecolor": "tab:red", "alpha": 0.85})
    curves = counts["model_curves"]
    grid = np.asarray(curves["mag"])
    styles = {"power_law": "-", "broken_power_law": "--", "double_power_law": ":"}
    for name, values in curves.items():
        if name == "mag":
            continue
        main = name == counts["model"]
        label = name.replace("_", " ") + (" (fitted)" if main else " (comparison)")
        if main and "slope" in counts["fit"]:
            slope = counts["fit"]["slope"]
            label += (f": slope {slope['median']:.3f} "
                      f"[{slope['interval_68'][0]:.3f}, {slope['interval_68'][1]:.3f}]")
        ax.plot(grid, values, styles.get(name, "-"), color="tab:red" if main else "tab:blue",
                lw=1.6 if main else 1.0, label=label)
    fit_lo, fit_hi = counts["fit"]["fit_range"]
    for axis in (ax, res):
        axis.axvspan(fit_lo, fit_hi, color="tab:green", alpha=0.07, lw=0)
    ax.set_yscale("log")
    # Head room above the data for the legend; the model curves set the scale when no bin
    # holds a source.
    positive = raw[shown]
    if positive.size:
        top = max(positive.max(), corr[ok].max()) if ok.any() else positive.max()
        ax.set_ylim(0.5 * positive.min(), 300 * top)
    else:
        model = np.concatenate([np.asarray(v, dtype=float) for k, v in curves.items()
                                if k != "mag"])
        model = model[np.isfinite(model) & (model > 0)]
        if model.size:
            ax.set_ylim(0.5 * model.min(), 300 * model.max())
    ax.set_ylabel("sources per deg² per mag")
    ax.grid(alpha=0.3, which="both")
    ax.legend(fontsize=7.5, loc="upper left")
    ax.set_title(title or "Differential number counts (fit range shaded)", fontsize=11)
    expected = np.asarray(counts["expected_counts"], dtype=float)
    pull = np.where(expected > 0, (n_obs - expected) / np.sqrt(np.maximum(expected, 1e-300)),
                    np.nan)
    res.axhline(0, color="k", lw=0.8)
    res.plot(mid[used], pull[used], "o", color="tab:red", ms=3.5)
    res.plot(mid[~used & shown], pull[~used & shown], "o", mfc="none", mec="grey", ms=3)
    res.set_ylabel(f"(N − μ) / √μ\n{counts['model'].replace('_', ' ')}", fontsize=9)
    res.set_xlabel("magnitude")
    res.grid(alpha=0.3)
    fig.tight_layout()
    _save(fig, path)
    return notes


def sky_model_figure(sky, path, title=None):
    """The sky model: densities per unit against latitude, residuals, and the totals.

    Parameters
    ----------
    sky : mapping
        The ``sky_model`` block of ``results.json``.
    path : path
        PNG to write.
    """
    plt = _pyplot()
    units = sky["units"]
    l_deg = np.asarray(units["l_deg"], dtype=float)
    b_deg = np.asarray(units["b_deg"], dtype=float)
    n = np.asarray(units["counts"], dtype=float)
    exposure = np.asarray(units["exposure_deg2"], dtype=float)
    expected = np.asarray(units["expected_best"], dtype=float)
    ok = exposure > 0
    best = max(sky["model"]["sets"], key=lambda s: s["weight"])
    fig = plt.figure(figsize=(14, 4.9))
    grid = fig.add_gridspec(1, 3, width_ratios=[1.15, 1.0, 1.15])
    ax = fig.add_subplot(grid[0])
    density = np.where(ok, n / np.where(ok, exposure, 1.0), np.nan)
    error = np.where(ok, np.sqrt(np.maximum(n, 1.0)) / np.where(ok, exposure, 1.0), np.nan)
    colour = np.cos(np.radians(l_deg))
    points = ax.scatter(np.abs(b_deg[ok]), density[ok], c=colour[ok], cmap="coolwarm",
                        vmin=-1, vmax=1, s=22, zorder=3, label="observed (corrected for "
                        "completeness)")
    ax.errorbar(np.abs(b_deg[ok]), density[ok], yerr=error[ok], fmt="none", ecolor="grey",
                lw=0.8, zorder=2)
    ax.scatter(np.abs(b_deg[ok]), (expected / np.where(ok, exposure, 1.0))[ok], marker="_",
               s=120, color="k", lw=1.2, zorder=4,
               label=f"best model ({', '.join(best['covariates']) or 'constant'})")
    fig.colorbar(points, ax=ax, label="cos l (+1 toward the galactic centre)", shrink=0.85)
    ax.set_yscale("log")
    ax.set_xlabel("|galactic latitude b| [deg]")
    ax.set_ylabel(f"sources brighter than {sky['mag_limit']:g} per deg²")
    ax.set_title(f"{units['n_units']} units in {units['n_fields']} fields", fontsize=10)
    ax.grid(alpha=0.3, which="both")
    ax.legend(fontsize=7.5, loc="upper right")

    res = fig.add_subplot(grid[1])
    ratio = np.where(ok & (expected > 0), n / np.where(expected > 0, expected, 1.0), np.nan)
    ratio_err = np.where(ok & (expected > 0), np.sqrt(np.maximum(n, 1.0))
                         / np.where(expected > 0, expected, 1.0), np.nan)
    res.errorbar(l_deg[ok], ratio[ok], yerr=ratio_err[ok], fmt="none", ecolor="grey", lw=0.8)
    sc = res.scatter(l_deg[ok], ratio[ok], c=np.abs(b_deg[ok]), cmap="viridis", s=22, zorder=3)
    fig.colorbar(sc, ax=res, label="|b| [deg]", shrink=0.85)
    res.axhline(1.0, color="k", lw=0.8)
    res.set_xlim(0, 360)
    res.set_xticks(np.arange(0, 361, 60))
    res.set_xlabel("galactic longitude l [deg]")
    res.set_ylabel("observed / best model")
    res.set_title("Residuals (Poisson error bars)", fontsize=10)
    res.grid(alpha=0.3)

    tot = fig.add_subplot(grid[2])
    rows = [("plain area scaling", sky["naive"], "tab:grey")]
    for entry in sky["prediction"]["per_set"]:
        name = ", ".join(entry["covariates"]) or "constant"
        rows.append((f"{name}\n(weight {entry['weight']:.2f})", entry["total"], "tab:blue"))
    rows.append(("sky model (all sets)", sky["total"], "tab:red"))
    for i, (_label, est, colour_) in enumerate(rows):
        y = len(rows) - 1 - i
        lo95, hi95 = est["interval_95"]
        lo68, hi68 = est["interval_68"]
        tot.plot([lo95, hi95], [y, y], color=colour_, lw=1.2)
        tot.plot([lo68, hi68], [y, y], color=colour_, lw=4.5, solid_capstyle="butt")
        tot.plot(est["median"], y, "o", color="white", mec=colour_, ms=6)
    tot.set_yticks(range(len(rows)))
    tot.set_yticklabels([r[0] for r in reversed(rows)], fontsize=7.5)
    tot.set_xscale("log")
    area = sky["target_sky"]["area_deg2"]
    tot.set_xlabel(f"sources over the target sky ({area:,.0f} deg²)")
    outside = sky["fraction_outside_observed_range"]["area"]
    tot.set_title("Totals: median, 68 % (thick) and 95 %"
                  + (f"\n{100 * outside:.3g} % of the target is an extrapolation"
                     if outside > 0 else ""), fontsize=10)
    tot.grid(alpha=0.3, which="both", axis="x")
    if title:
        fig.suptitle(title, fontsize=11)
    fig.tight_layout()
    _save(fig, path)


def contamination_figure(contamination, path, title=None):
    """Stars among the sources: counts per bin and the contamination fraction."""
    plt = _pyplot()
    edges = np.asarray(contamination["mag_edges"], dtype=float)
    mid = 0.5 * (edges[1:] + edges[:-1])

    def values(key):
        return np.array([np.nan if v is None else v for v in contamination[key]], dtype=float)

    sources, stars, galaxies = values("n_sources"), values("n_stars"), values("n_galaxies")
    fraction = values("fraction")
    bounds = np.array([[np.nan, np.nan] if v[0] is None else v
                       for v in contamination["fraction_interval_68"]], dtype=float)
    fig, (ax, frac) = plt.subplots(2, 1, figsize=(8, 6.5), sharex=True,
                                   gridspec_kw={"height_ratios": [1.4, 1]})
    shown = sources > 0
    ax.step(mid[shown], sources[shown], where="mid", color="k", label="all sources")
    ax.step(mid[shown], np.where(stars[shown] > 0, stars[shown], np.nan), where="mid",
            color="tab:orange", label="stars")
    ax.step(mid[shown], np.where(galaxies[shown] > 0, galaxies[shown], np.nan), where="mid",
            color="tab:blue", label="galaxies (sources − stars)")
    ax.set_yscale("log")
    ax.set_ylabel("sources per bin")
    ax.legend(fontsize=8)
    ax.grid(alpha=0.3, which="both")
    method = ("star/galaxy classifier" if contamination["method"] == "classifier"
              else "star catalogue subtracted")
    ax.set_title(title or f"Stars among the sources ({method})", fontsize=11)
    yerr = np.abs(np.stack([fraction - bounds[:, 0], bounds[:, 1] - fraction]))[:, shown]
    frac.errorbar(mid[shown], fraction[shown], yerr=yerr, fmt="o", ms=3.5,
                  color="tab:orange", lw=0.9)
    frac.set_ylim(-0.05, 1.05)
    frac.set_ylabel("star fraction (68 %)")
    frac.set_xlabel("magnitude")
    frac.grid(alpha=0.3)
    fig.tight_layout()
    _save(fig, path)


def luminosity_function_figure(lf, path, title=None):
    """Luminosity (or mass) function: the three estimators on one plot, and the M*-alpha
    error ellipse.

    Parameters
    ----------
    lf : mapping
        The ``luminosity_function`` block of ``results.json``.
    path : path
        PNG to write.
    """
    plt = _pyplot()
    x_name = lf["x_name"]
    is_mag = x_name == "mag"
    per = "mag" if is_mag else "dex"
    sty = lf.get("sty")
    fig, (ax, el) = plt.subplots(1, 2, figsize=(12, 5.2),
                                 gridspec_kw={"width_ratios": [1.6, 1]})
    shown_y = []
    if sty is not None:
        curve = sty["curve"]
        grid = np.asarray(curve[x_name])
        ax.fill_between(grid, curve["band_lo"], curve["band_hi"], color="tab:red", alpha=0.25,
                        lw=0, label="STY, 68 % band")
        label = "STY " + sty["model"].replace("_", "-")
        ax.plot(grid, curve["phi"], color="tab:red", lw=1.6, label=label)
        shown_y += list(curve["phi"])
    for key, style, colour, name in (("vmax", "o", "k", "1/Vmax"),
                                     ("swml", "s", "tab:blue", "SWML")):
        block = lf.get(key)
        if block is None:
            continue
        x = np.asarray(block[x_name])
        phi = np.asarray(block["phi"])
        err = np.asarray(block["phi_err"])
        complete = np.asarray(block["complete"], dtype=bool)
        # Log axis: a lower error bar reaching 0 is drawn down to 1/10 of the point.
        lower = np.minimum(err, 0.9 * phi)
        offset = 0.03 if key == "swml" else -0.03  # side by side, not on top of each other
        ax.errorbar(x[complete] + offset, phi[complete],
                    yerr=np.stack([lower, err])[:, complete], fmt=style, ms=3.5,
                    color=colour, mfc=colour, lw=0.8,
                    label=f"{name}, 68 %")
        if (~complete).any():
            ax.errorbar(x[~complete] + offset, phi[~complete],
                        yerr=np.stack([lower, err])[:, ~complete], fmt=style, ms=3.5,
                        color=colour, mfc="none", lw=0.6, alpha=0.7,
                        label=f"{name}, bin only partly observable")
        shown_y += list(phi[phi > 0])
    ax.set_yscale("log")
    if shown_y:
        positive = np.asarray([v for v in shown_y if v > 0])
        ax.set_ylim(0.3 * positive.min(), 4 * positive.max())
    if is_mag:
        ax.invert_xaxis()
        ax.set_xlabel("absolute magnitude M + Q z (evolution-corrected to z = 0)"
                      if lf["selection"]["evolution"]["Q"] else "absolute magnitude M")
    else:
        ax.set_xlabel("log10 stellar mass [Msun]")
    ax.set_ylabel(f"φ [Mpc⁻³ {per}⁻¹] (H0 = {lf['selection']['H0']:g})")
    ax.grid(alpha=0.3, which="both")
    ax.legend(fontsize=8, loc="lower left")
    n_used = lf["sample"]["n_used"]
    z_lo, z_hi = lf["selection"]["redshift_range"]
    ax.set_title(f"{n_used:,d} galaxies, {z_lo:g} < z < {z_hi:g}", fontsize=10)

    if sty is not None:
        ellipse = sty["ellipse"]
        centre = ellipse["centre"]
        for points, level, ls in zip(ellipse["points"], ellipse["levels"], ("-", "--"),
                                     strict=True):
            el.plot(points[0], points[1], ls, color="tab:red", lw=1.3,
                    label=f"{100 * level:.1f} % joint region")
        el.plot(centre[0], centre[1], "+", color="tab:red", ms=10, mew=1.5, label="STY best fit")
        names = ellipse["names"]
        labels = {"m_star": "M* [mag]", "alpha": "α", "log10_mass_star": "log10 M* [Msun]",
                  "alpha_1": "α₁"}
        el.set_xlabel(labels.get(names[0], names[0]))
        el.set_ylabel(labels.get(names[1], names[1]))
        if names[0] == "m_star":
            el.invert_xaxis()
        el.grid(alpha=0.3)
        el.legend(fontsize=8)
        errs = [sty[n]["interval_68"] for n in names]
        short = {"m_star": "M*", "alpha": "α", "log10_mass_star": "log10 M*", "alpha_1": "α₁"}
        el.set_title("\n".join(
            f"{short.get(n, n)} = {c:.3f} (68 %: {e[0]:.3f} to {e[1]:.3f})"
            for n, c, e in zip(names, centre, errs, strict=True)), fontsize=9)
    else:
        el.text(0.5, 0.5, "STY not run", ha="center", va="center")
        el.set_axis_off()
    if title:
        fig.suptitle(title)
    fig.tight_layout(rect=(0, 0, 1, 0.95))
    _save(fig, path)


def _save(fig, path):
    plt = _pyplot()
    with atomic_path(path, suffix=".png") as tmp:
        fig.savefig(tmp, dpi=110, format="png")
    plt.close(fig)


def variance_figure(variance, path, title=None):
    """Fractional Poisson and cosmic-variance errors of the mean density against area.

    Parameters
    ----------
    variance : mapping
        The ``variance`` block of ``results.json`` (its ``area_curve``: circular fields with
        the survey's own n(z), bias and surface density; ``area_curve.footprint``: the
        survey's own footprint, with its real shape).
    path : path
        PNG to write.

    Returns
    -------
    list of str
        Notes on parts left empty (none: the figure is drawn only with an area curve).
    """
    plt = _pyplot()
    curve = variance["area_curve"]
    area = np.asarray(curve["area_deg2"])
    fig, ax = plt.subplots(figsize=(8, 5.5))
    ax.loglog(area, curve["poisson"], "--", color="tab:blue", lw=1.4,
              label="Poisson, 1/√N")
    ax.loglog(area, curve["cosmic_variance"], "-", color="tab:red", lw=1.4,
              label="cosmic variance (analytic, one circular field)")
    ax.loglog(area, curve["total"], "-", color="k", lw=2.0, alpha=0.7,
              label="Poisson ⊕ cosmic variance")
    own = curve["footprint"]
    ax.plot([own["area_deg2"]], [own["cosmic_variance"]], "o", color="tab:red", ms=8,
            mec="k", label=f"this footprint's cosmic variance (its real shape): "
                           f"{own['cosmic_variance']:.3g}")
    ax.plot([own["area_deg2"]], [own["poisson"]], "s", color="tab:blue", ms=7, mec="k",
            label=f"this footprint's Poisson error: {own['poisson']:.3g}")
    jackknife = variance.get("jackknife")
    if jackknife and jackknife.get("clustering_fraction", 0) > 0:
        ax.plot([own["area_deg2"]], [jackknife["clustering_fraction"]], "D", mfc="none",
                mec="tab:purple", ms=8, mew=1.5,
                label=f"jackknife clustering excess ({jackknife['n_regions']} regions): "
                      f"{jackknife['clustering_fraction']:.3g}")
    cross = curve.get("crossover_area_deg2")
    if cross:
        ax.axvline(cross, color="grey", ls=":", lw=1)
        ax.text(cross, 0.62, f" cosmic variance > Poisson\n above {cross:.3g} deg²",
                transform=ax.get_xaxis_transform(), fontsize=8, color="dimgrey")
    analytic = variance["analytic"]
    nz = analytic["nz"]
    ax.set_xlabel("area [deg²]")
    ax.set_ylabel("fractional error of the mean surface density (1σ)")
    ax.set_title(title or "Poisson and cosmic variance against area", fontsize=11)
    ax.text(0.99, 0.99, f"m < {variance['m_limit']:g}; {variance['density_per_deg2']:.4g} per "
            f"deg²\nn(z) median {nz['median']:.3g}; bias {analytic['bias']:g}\n"
            f"{analytic['power_spectrum']['model']}, linear",
            transform=ax.transAxes, ha="right", va="top", fontsize=8,
            bbox={"fc": "white", "ec": "0.8", "alpha": 0.9})
    ax.grid(alpha=0.3, which="both")
    ax.legend(fontsize=7.5, loc="lower left")
    fig.tight_layout()
    _save(fig, path)
    return []


def plan_figure(plan, path, title=None):
    """Survey plan: fractional error of the surface density against area, by layout.

    Parameters
    ----------
    plan : mapping
        The JSON of ``countscale plan`` (``curve`` of the main layout, ``layouts``,
        ``target_precision``, ``required_area_deg2``).
    path : path
        PNG to write.
    """
    plt = _pyplot()
    curve = plan["curve"]
    area = np.array([p["area_deg2"] for p in curve])
    fig, ax = plt.subplots(figsize=(8.5, 5.8))
    layout = plan["layout"]
    ax.loglog(area, [p["poisson"] for p in curve], "--", color="tab:blue", lw=1.3,
              label="Poisson, 1/√N")
    ax.loglog(area, [p["cosmic_variance"] for p in curve], "-", color="tab:red", lw=1.3,
              label=f"cosmic variance, {layout['description']}")
    ax.loglog(area, [p["total"] for p in curve], "-", color="k", lw=2.2,
              label="total (Poisson ⊕ cosmic variance)")
    styles = {"contiguous": ("tab:green", "-."), "strip": ("tab:purple", ":"),
              "fields": ("tab:orange", (0, (5, 2)))}
    for kind, entry in plan["layouts"].items():
        other = entry.get("curve")
        if kind == layout["kind"] or not other:
            continue
        color, style = styles[kind]
        ax.loglog([p["area_deg2"] for p in other], [p["total"] for p in other], ls=style,
                  color=color, lw=1.4, label=f"total, {entry['description']}")
    target = plan.get("target_precision")
    if target:
        ax.axhline(target, color="grey", lw=1, ls=":")
        required = plan.get("required_area_deg2")
        if required:
            ax.plot([required], [target], "o", color="k", ms=7)
            right = np.log(required / area[0]) > 0.6 * np.log(area[-1] / area[0])
            ax.annotate(f"target {target:g}: {required:,.3g} deg²", (required, target),
                        xytext=(-8, -14) if right else (8, 8), textcoords="offset points",
                        fontsize=8.5, ha="right" if right else "left")
        else:
            ax.text(area[0], target * 1.08, f"target {target:g}: not reachable (floor "
                    f"{plan['floor_precision']:.3g})", fontsize=8.5, color="grey")
    cross = plan.get("crossover_area_deg2")
    if cross:
        ax.axvline(cross, color="grey", lw=0.8, ls="--", alpha=0.6)
        ax.text(cross, 0.62, f" cosmic variance > Poisson\n above {cross:.3g} deg²",
                transform=ax.get_xaxis_transform(), fontsize=8, color="dimgrey")
    pop = plan["population"]
    ax.text(0.99, 0.99, f"{plan['quantity']}\n{pop['surface_density_per_deg2']:.4g} per deg²; "
            f"n(z) median {pop['redshift_median']:.3g}; bias {pop['bias']:g}\nlinear theory "
            "(an underestimate for small fields)", transform=ax.transAxes, ha="right",
            va="top", fontsize=8, bbox={"fc": "white", "ec": "0.8", "alpha": 0.9})
    ax.set_xlabel("total survey area [deg²]")
    ax.set_ylabel("fractional error of the surface density (1σ)")
    ax.set_title(title or "Survey plan: precision against area", fontsize=11)
    ax.grid(alpha=0.3, which="both")
    ax.legend(fontsize=7.5, loc="lower left")
    fig.tight_layout()
    _save(fig, path)


#: Totals drawn in the totals figure, grouped by panel (the same unit within a panel).
_TOTAL_PANELS = (
    ("Sources over the sky", (("sky_total", "sky_total"),
                              ("sky_total_naive", "plain area scaling"))),
    ("Galaxies in a volume", (("present_day_volume_total", "present-day density × volume"),
                              ("light_cone_total", "along our past light cone"))),
    ("Stars", (("stars_total", "stars_total"),)),
    ("Stars in one galaxy", (("stars_per_galaxy", "stars_per_galaxy"),)),
)


def totals_figure(totals, path, title=None):
    """The totals: median, 68 % and 95 % intervals on a log scale, a panel per kind.

    Parameters
    ----------
    totals : mapping
        The ``totals`` block of ``results.json``.
    path : path
        PNG to write.
    """
    plt = _pyplot()
    from matplotlib import ticker

    counted = ((totals.get("details") or {}).get("stars") or {}).get("quantity_counted", "")
    same_as_sky = counted.startswith("stars on the sky")  # stars_total is sky_total then
    panels = [(name, [(key, label) for key, label in rows if isinstance(totals.get(key), dict)
                      and not (key == "stars_total" and same_as_sky)])
              for name, rows in _TOTAL_PANELS]
    panels = [(name, rows) for name, rows in panels if rows]
    if not panels:
        return _empty_totals_figure(path, title, "no total was computed")
    heights = [len(rows) + 0.9 for _, rows in panels]
    fig, axes = plt.subplots(len(panels), 1, figsize=(10, 1.0 + 0.62 * sum(heights)),
                             gridspec_kw={"height_ratios": heights}, squeeze=False)
    cautions = totals.get("cautions", {})
    for ax, (name, rows) in zip(axes[:, 0], panels, strict=True):
        values = []
        for i, (key, _label) in enumerate(rows):
            est = totals[key]
            y = len(rows) - 1 - i
            colour = "tab:grey" if key == "sky_total_naive" else "tab:blue"
            lo95, hi95 = est["interval_95"]
            lo68, hi68 = est["interval_68"]
            ax.plot([lo95, hi95], [y, y], color=colour, lw=1.3)
            ax.plot([lo68, hi68], [y, y], color=colour, lw=6, solid_capstyle="butt")
            ax.plot(est["median"], y, "o", color="white", mec=colour, ms=7, zorder=3)
            values += [lo95, hi95]
            flag = " (!)" if cautions.get(key) else ""
            ax.text(1.01, y, f"{est['median']:.3g} {est['unit']}{flag}", va="center",
                    fontsize=8, color="tab:red" if flag else "black",
                    transform=ax.get_yaxis_transform())
        ax.set_yticks(range(len(rows)))
        ax.set_yticklabels([label for _, label in reversed(rows)], fontsize=8.5)
        ax.set_ylim(-0.7, len(rows) - 0.3)
        lo, hi = min(values), max(values)
        span = np.log10(hi / lo)
        margin = 10 ** max(0.15 * span, 0.01)
        if span > 0.5:
            ax.set_xscale("log")
            ax.set_xlim(lo / margin, hi * margin)
        else:  # a narrow range reads better on a linear axis
            ax.set_xlim(lo / margin, hi * margin)
            ax.xaxis.set_major_formatter(ticker.ScalarFormatter(useMathText=True))
            ax.ticklabel_format(axis="x", style="sci", scilimits=(0, 0))
        ax.set_title(name, fontsize=9.5, loc="left")
        ax.grid(alpha=0.3, which="both", axis="x")
    legend = ("median (circle), 68 % (thick) and 95 % (thin) intervals; (!) = a caution in the "
              "report")
    fig.suptitle(f"{title}\n{legend}" if title else legend, fontsize=10)
    fig.tight_layout()
    fig.subplots_adjust(right=0.8)
    _save(fig, path)
    return []


def _empty_totals_figure(path, title, reason):
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(8, 2.5))
    ax.axis("off")
    ax.text(0.5, 0.5, reason, ha="center", va="center", fontsize=11)
    if title:
        ax.set_title(title, fontsize=11)
    _save(fig, path)
    return [reason]


def totals_budget_figure(totals, path, title=None):
    """The error budgets of the totals: each source's share of the variance of log10.

    One horizontal bar per total (plain area scaling left out: Poisson only), split by
    source, with the 68 % interval's half-width in dex beside its name.
    """
    plt = _pyplot()
    counted = ((totals.get("details") or {}).get("stars") or {}).get("quantity_counted", "")
    skip = {"sky_total_naive"} | ({"stars_total"} if counted.startswith("stars on the sky")
                                  else set())
    keys = [key for key, _ in (row for _, rows in _TOTAL_PANELS for row in rows)
            if key not in skip and isinstance(totals.get(key), dict)
            and totals[key].get("budget")]
    sources = []
    for key in keys:
        for source in totals[key]["budget"]:
            if source not in sources:
                sources.append(source)
    if not keys:
        return _empty_totals_figure(path, title, "no total has an error budget")
    cmap = plt.get_cmap("tab20")
    colours = {s: cmap(i % 20) for i, s in enumerate(sources)}
    fig, ax = plt.subplots(figsize=(10.5, 1.5 + 0.5 * max(len(keys), 1)))
    labels = []
    for i, key in enumerate(keys):
        y = len(keys) - 1 - i
        left = 0.0
        for source in sources:
            share = float(totals[key]["budget"].get(source, 0.0))
            if share <= 0:
                continue
            ax.barh(y, share, left=left, color=colours[source], edgecolor="white", lw=0.5)
            if share >= 0.06:
                ax.text(left + share / 2, y, f"{share:.0%}", ha="center", va="center",
                        fontsize=7.5)
            left += share
        lo, hi = totals[key]["interval_68"]
        width = 0.5 * np.log10(hi / lo) if lo > 0 else float("nan")
        labels.append(f"{key}\n(±{width:.3f} dex)")
    ax.set_yticks(range(len(keys)))
    ax.set_yticklabels(list(reversed(labels)), fontsize=8)
    ax.set_xlim(0, 1)
    ax.set_xlabel("share of the variance of log10 of the total")
    handles = [plt.Rectangle((0, 0), 1, 1, color=colours[s]) for s in sources]
    ax.legend(handles, sources, fontsize=7.5, loc="center left", bbox_to_anchor=(1.01, 0.5),
              title="source", title_fontsize=8)
    if title:
        ax.set_title(title, fontsize=11)
    fig.tight_layout()
    _save(fig, path)
    return []
