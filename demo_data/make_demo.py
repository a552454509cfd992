"""Build the bundled demo survey, the Fernhollow Imaging Survey (fictional), from countscale.mock.

    python demo_data/make_demo.py                 # rewrite the files in demo_data/
    python demo_data/make_demo.py --out DIR       # write them somewhere else
    python demo_data/make_demo.py --small --out DIR --no-plots   # a 1.5 deg^2 version, fast

Everything comes from one fixed seed, and every file is written deterministically (no dates,
no checksums, fixed compression), so running this again gives the same bytes with the same
library versions. The PNG figures depend on matplotlib's and FreeType's versions; they are for
looking at, not for comparing. See README.md in this folder for the story and the choices.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from pathlib import Path

import healpy as hp
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from countscale import cosmology
from countscale.extinction import ExtinctionMap
from countscale.footprint import Footprint
from countscale.lumfunc import Evolution
from countscale.mock import (
    DiskStars,
    Injections,
    LognormalClustering,
    Measurement,
    MockSpec,
    SchechterGalaxies,
    make_mock,
)

HERE = Path(__file__).resolve().parent
SURVEY = "Fernhollow Imaging Survey"
SEED = 5813  # the survey's one seed; the holes and the catalogue use streams derived from it

# The field: an RA/Dec box at galactic latitude +56..+64 deg (away from the disk, so few stars).
BOX = {"ra": (157.5, 166.0), "dec": (40.0, 46.4)}
SMALL_BOX = {"ra": (161.0, 162.7), "dec": (42.6, 43.8)}
MAX_ORDER = 15  # 6.4 arcsec cells at the boundaries; holes are >= 10 arcsec in radius

# Bright-star holes: every star of the star model brighter than r = 11 over the box, with a
# radius growing with brightness from 10" (r = 11) to 90" (r <= 7): r = 10" * 9^((11 - m) / 4).
HOLE_MAG = 11.0
HOLE_RADIUS_FAINT_ARCSEC = 10.0
HOLE_RADIUS_MAX_ARCSEC = 90.0

# Galaxies: Blanton et al. 2003, ApJ 592, 819 (^0.1r: phi* = 1.49e-2 h^3 Mpc^-3, M* - 5 log h =
# -20.44, alpha = -1.05), converted to Planck18's h; mild luminosity evolution and a red
# power-law K-correction chosen for this demo (not measurements).
H = cosmology.hubble_h("Planck18")
GALAXIES = SchechterGalaxies(
    m_star=cosmology.m_star_from_h_units(-20.44, H),
    alpha=-1.05,
    phi_star=cosmology.phi_star_from_h_units(1.49e-2, H),
    evolution=Evolution(Q=0.5, P=0.0),
    z_min=0.001,
    z_max=3.0,
    abs_mag_faint=-12.0,
    kcorrection_beta=-1.2,
)
# Projected clustering: C_ell = 6e-7 (ell / 100)^-1.2, which gives w(1 deg) ~ 8.5e-4, about
# what faint galaxy samples show (value from memory; common figure, no source).
CLUSTERING = LognormalClustering(cl_100=6e-7, slope=1.2, nside=512)
# Depth: 50 % completeness at r = 22.8 on average, 0.12 mag rms between HEALPix nside-64 tiles.
MEASUREMENT = Measurement(m50=22.8, width=0.15, m50_scatter=0.12, depth_nside=64,
                          sigma_floor=0.01)
N_INJECTIONS = 20_000
INJECTION_MAGS = (19.5, 25.0)
SPECZ_MAG = 19.8  # the redshift campaign took every galaxy with observed r <= 19.8
TRUTH_MAGS = (18.0, 19.0, 19.8, 20.0, 21.0, 22.0, 22.5, 23.0, 23.5, 24.0)
MAP_NSIDE = 4096  # footprint.fits: coverage fractions of 0.74 arcmin pixels

# Rows that a careful reader of the catalogue must reject (counted by the row ledger).
N_BAD_POSITION, N_BAD_MAGNITUDE, N_DUPLICATE_ID = 2, 3, 2
SENTINEL_MAG = 99.0
SAMPLE_ROWS = 1000
PARQUET_OPTIONS = dict(compression="zstd", compression_level=9, use_dictionary=False,
                       row_group_size=1 << 20)

# -- The Fernhollow Star Fields: a companion snapshot programme for stars ----------------------
# Fields (galactic l, b in degrees) across latitude and longitude, both hemispheres; the four
# at |b| = 15 toward the galactic centre and anticentre and the two at the poles bound the
# covariates the sky model uses over the target |b| > 20 (so the total needs no extrapolation).
STAR_FIELDS_LB = (
    (0.0, 15.0), (180.0, 15.0), (0.0, -15.0), (180.0, -15.0),
    (290.0, 15.0), (75.0, -15.0), (185.0, 20.0), (103.0, -20.0), (20.0, 25.0), (138.0, -25.0),
    (147.0, 30.0), (16.0, -30.0), (240.0, 35.0), (310.0, -35.0), (18.0, 40.0), (200.0, -40.0),
    (235.0, 50.0), (84.0, -50.0), (157.0, 60.0), (351.0, -60.0), (323.0, 70.0), (264.0, -70.0),
    (141.0, 80.0), (178.0, -80.0), (0.0, 89.5), (0.0, -89.5),
)
# Each field's radius is chosen so that it holds about STARS_PER_FIELD stars brighter than
# STAR_RADIUS_MAG, between 0.05 and 1.5 degrees (small near the plane, large near the poles).
STARS_PER_FIELD = 3000
STAR_RADIUS_MAG = 19.8
STAR_RADIUS_RANGE_DEG = (0.05, 1.5)
STAR_MAX_ORDER = 13
# A disk with a radial gradient (thin-disk scale height 300 pc, scale length 2.6 kpc; Juric et
# al. 2008, ApJ 673, 864, from memory) and the mock's default star classes.
STAR_MODEL = DiskStars(scale_length_pc=2600.0)
STAR_MEASUREMENT = Measurement(m50=19.5, width=0.15, m50_scatter=0.1, depth_nside=64,
                               sigma_floor=0.01)
N_STAR_INJECTIONS = 4000
STAR_INJECTION_MAGS = (16.5, 21.5)
STAR_TRUTH_MAGS = (16.0, 17.0, 18.0, 18.5, 19.0)
STAR_SKY_MAG = 18.5            # the run's whole_sky_mag_limit: m50 - 1, complete everywhere
STAR_TARGET_B = 20.0           # target_sky: |b| > 20 degrees
# A synthetic E(B-V) map of our own (no real dust map): a screen that thickens toward the
# plane as 1 / sin|b| (a plane-parallel layer) with a longitude gradient, a north-south
# asymmetry and a patchy term; capped where it would be extreme. sdss_r coefficient.
EBV_NSIDE = 64
EBV_BAND = "sdss_r"


def synthetic_ebv(nside):
    """E(B-V) per RING pixel: 0.03 / max(sin|b|, 0.05) (1 + 0.4 cos l)(1 + 0.15 sin b) x patches."""
    from countscale.skymodel import galactic_lb

    pix = np.arange(hp.nside2npix(nside))
    l_deg, b_deg = galactic_lb(round(math.log2(nside)), hp.ring2nest(nside, pix))
    lr, br = np.radians(l_deg), np.radians(b_deg)
    layer = 0.03 / np.maximum(np.abs(np.sin(br)), 0.05)
    patches = 1.0 + 0.2 * np.sin(3.0 * lr) * np.cos(5.0 * br)
    ebv = layer * (1.0 + 0.4 * np.cos(lr)) * (1.0 + 0.15 * np.sin(br)) * patches
    return np.round(np.minimum(ebv, 1.5), 4).astype(np.float32)


def star_field_footprint():
    """The star fields as caps (ICRS centres from galactic l, b), and their table."""
    from astropy.coordinates import SkyCoord
    import astropy.units as u

    l_deg, b_deg = np.array(STAR_FIELDS_LB).T
    icrs = SkyCoord(l=l_deg * u.deg, b=b_deg * u.deg, frame="galactic").icrs
    ra = decimal_round(icrs.ra.deg, 4)
    dec = decimal_round(icrs.dec.deg, 4)
    lr, br = np.radians(l_deg), np.radians(b_deg)
    density = STAR_MODEL.density_per_sr(np.abs(np.sin(br)), STAR_RADIUS_MAG,
                                        np.cos(br) * np.cos(lr)) / (180 / math.pi) ** 2
    radius = np.sqrt(STARS_PER_FIELD / density / math.pi)
    radius = decimal_round(np.clip(radius, *STAR_RADIUS_RANGE_DEG), 3)
    table = pd.DataFrame({"l": l_deg, "b": b_deg, "ra": ra, "dec": dec, "radius": radius})
    footprint = None
    for row in table.itertuples():
        cap = Footprint.cap(row.ra, row.dec, row.radius, max_order=STAR_MAX_ORDER)
        footprint = cap if footprint is None else footprint | cap
    return footprint, table


# --------------------------------------------------------------------------------------------
def decimal_round(values, decimals):
    """Round to the double nearest the printed decimal, so CSV files read back exactly."""
    return np.array([float(f"{v:.{decimals}f}") for v in np.asarray(values, dtype=float)])


def written_with():
    import astropy
    import scipy

    return {"numpy": np.__version__, "scipy": scipy.__version__, "pandas": pd.__version__,
            "pyarrow": pa.__version__, "astropy": astropy.__version__,
            "healpy": hp.__version__}


def bright_star_holes(box_fp, seed):
    spec = MockSpec(stars=DiskStars(), measurement=Measurement(m50=30.0),
                    mag_limits=(HOLE_MAG,), generation_mag_limit=HOLE_MAG)
    stars = make_mock(spec, rng=seed, footprint=box_fp, include_undetected=True).catalogue
    radius = HOLE_RADIUS_FAINT_ARCSEC * 9.0 ** ((HOLE_MAG - stars.mag_true.to_numpy()) / 4.0)
    holes = pd.DataFrame({
        "ra": decimal_round(stars.ra, 6),
        "dec": decimal_round(stars.dec, 6),
        "radius_arcsec": decimal_round(np.minimum(radius, HOLE_RADIUS_MAX_ARCSEC), 2),
        "mag_r": decimal_round(stars.mag_true, 3),
    })
    return holes.sort_values(["ra", "dec"], kind="stable").reset_index(drop=True)


def write_csv(frame, path, formats):
    """CSV with fixed number formats per column (empty for NaN) and Unix line ends."""
    out = frame.copy()
    for name, fmt in formats.items():
        out[name] = [("" if np.isnan(v) else fmt % v) for v in out[name].to_numpy(dtype=float)]
    path.write_text(out.to_csv(index=False, lineterminator="\n"), encoding="utf-8")


def write_parquet(frame, path):
    table = pa.Table.from_pandas(frame, preserve_index=False).replace_schema_metadata(None)
    pq.write_table(table, path, **PARQUET_OPTIONS)


def sky_order(ra, dec):
    """Rows in HEALPix NEST order at order 16: neighbours on the sky sit together (compresses)."""
    pix = hp.ang2pix(2**16, ra, dec, nest=True, lonlat=True)
    return np.lexsort((dec, ra, pix))


def catalogue_rows(mock, footprint, population):
    """Detected sources of one population, rounded as published and sorted on the sky."""
    cat = mock.catalogue
    cat = cat[cat.population == population]
    ra, dec = np.round(cat.ra.to_numpy(), 6), np.round(cat.dec.to_numpy(), 6)
    # Rounding moves a position by <= 2.5 mas; a source that crosses a boundary doing so is
    # dropped, so that every published position is inside the footprint.
    inside = footprint.contains(ra, dec)
    order = sky_order(ra[inside], dec[inside])
    rows = {
        "ra": ra[inside][order],
        "dec": dec[inside][order],
        "mag_r": np.round(cat.mag.to_numpy()[inside][order], 3).astype(np.float32),
        "mag_r_err": np.round(cat.mag_err.to_numpy()[inside][order], 3).astype(np.float32),
    }
    extra = {"z": cat.z.to_numpy()[inside][order], "mag_true": cat.mag_true.to_numpy()[
        inside][order]}
    return rows, int((~inside).sum()), extra


def add_bad_rows(frame, rng):
    """Insert rows with a NaN position, a sentinel magnitude, and a repeated id."""
    n = len(frame)
    pick = rng.choice(n, N_BAD_POSITION + N_BAD_MAGNITUDE + N_DUPLICATE_ID, replace=False)
    bad = frame.iloc[pick].copy()
    next_id = int(frame["id"].max()) + 1
    kinds = (["ra_dec_not_finite"] * N_BAD_POSITION + ["mag_missing"] * N_BAD_MAGNITUDE
             + ["duplicate_id"] * N_DUPLICATE_ID)
    for row, kind in zip(range(len(bad)), kinds, strict=True):
        if kind == "ra_dec_not_finite":
            bad.iloc[row, bad.columns.get_loc("ra")] = np.nan
            bad.iloc[row, bad.columns.get_loc("id")] = next_id
            next_id += 1
        elif kind == "mag_missing":
            bad.iloc[row, bad.columns.get_loc("mag_r")] = np.float32(SENTINEL_MAG)
            bad.iloc[row, bad.columns.get_loc("mag_r_err")] = np.float32(SENTINEL_MAG)
            bad.iloc[row, bad.columns.get_loc("z_spec")] = np.nan
            bad.iloc[row, bad.columns.get_loc("id")] = next_id
            next_id += 1
        else:  # a second measurement of the same source, 0.05 mag different
            bad.iloc[row, bad.columns.get_loc("mag_r")] += np.float32(0.05)
    # Each bad row goes right after a random row of the catalogue.
    where = np.sort(rng.choice(n, len(bad), replace=False))
    pieces, last = [], 0
    for at, row in zip(where, range(len(bad)), strict=True):
        pieces.append(frame.iloc[last : at + 1])
        pieces.append(bad.iloc[[row]])
        last = at + 1
    pieces.append(frame.iloc[last:])
    out = pd.concat(pieces, ignore_index=True)
    positions = where + np.arange(1, len(bad) + 1)  # rows of `out` holding the bad rows
    bad_ids = {kind: [] for kind in kinds}
    for kind, identifier in zip(kinds, bad["id"].tolist(), strict=True):
        bad_ids[kind].append(int(identifier))
    return out, bad_ids, positions


def runfile_text(name, box_spec, catalogue, population, spec_limit, counts_range,
                 whole_sky_mag):
    ra, dec = box_spec["ra"], box_spec["dec"]
    redshift = '\nredshift = "z_spec"' if population == "galaxies" else ""
    lf = ""
    if population == "galaxies":
        lf = f"""
[luminosity_function]
methods = ["vmax", "sty", "swml"]
redshift_range = [0.01, 0.3]
mag_limits = [12.0, {spec_limit}]
kcorrection = {{beta = {GALAXIES.kcorrection_beta}}}
evolution = {{Q = {GALAXIES.evolution.Q}, P = {GALAXIES.evolution.P}}}
"""
    return f"""# {SURVEY} (fictional demo survey; see README.md). Run with:
#   countscale run demo_data/{name}
# Paths are relative to this file's folder.

[survey]
name = "{SURVEY}{' (stars)' if population == 'stars' else ''}"
description = "One-band r imaging of the Fernhollow Field, 40 deg^2, m50 ~ 22.8 (a mock)"

[catalog]
paths = ["{catalogue}"]
ra = "ra"
dec = "dec"
mag = "mag_r"
mag_error = "mag_r_err"{redshift}
id = "id"
population = "{population}"

[footprint]
max_order = {MAX_ORDER}
include = [{{box = {{ra = [{ra[0]}, {ra[1]}], dec = [{dec[0]}, {dec[1]}]}}}}]
exclude = [{{circles = "holes.csv"}}]

[completeness]
injections = "injections.csv"
model = "logistic"
depth_map = "depth.fits"

[counts]
bins = {{start = {counts_range[0]}, stop = {counts_range[1]}, width = 0.2}}
model = "power_law"
fit_range = [{counts_range[2]}, {counts_range[3]}]
{lf}
[variance]
methods = ["jackknife", "analytic"]
regions = 24

[totals]
whole_sky_mag_limit = {whole_sky_mag}
stars = {'true' if population == 'stars' else 'false'}

[cosmology]
name = "Planck18"

[output]
dir = "countscale_demo_out"
"""


# --------------------------------------------------------------------------------------------
def build(out, small=False, plots=True):
    """Write every demo file into `out`; return the truth record (a dict)."""
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    box_spec = SMALL_BOX if small else BOX
    root = np.random.SeedSequence(SEED)
    seed_holes, seed_mock, seed_rows = (int(s.generate_state(1)[0]) for s in root.spawn(3))

    box = Footprint.box(box_spec["ra"], box_spec["dec"], max_order=MAX_ORDER)
    holes = bright_star_holes(box, seed_holes)
    write_csv(holes, out / "holes.csv",
              {"ra": "%.6f", "dec": "%.6f", "radius_arcsec": "%.2f", "mag_r": "%.3f"})
    # The footprint exactly as the run file builds it: the box minus holes.csv.
    footprint = box - Footprint.read_circles(out / "holes.csv", max_order=MAX_ORDER)

    spec = MockSpec(
        galaxies=GALAXIES,
        stars=DiskStars(),
        clustering=CLUSTERING,
        measurement=MEASUREMENT,
        injections=Injections(n=N_INJECTIONS // (10 if small else 1), mag_range=INJECTION_MAGS),
        mag_limits=TRUTH_MAGS,
        seed=seed_mock,
    )
    mock = make_mock(spec, footprint=footprint)

    # -- galaxy catalogue ---------------------------------------------------------------------
    rows, dropped_galaxies, extra = catalogue_rows(mock, footprint, "galaxy")
    z_spec = np.where(rows["mag_r"] <= SPECZ_MAG, np.round(extra["z"], 5), np.nan)
    galaxies = pd.DataFrame({
        "id": np.arange(1, rows["ra"].size + 1, dtype=np.int64),
        **rows,
        "z_spec": z_spec.astype(np.float32),
    })
    rng = np.random.default_rng(seed_rows)
    catalogue, bad_ids, bad_positions = add_bad_rows(galaxies, rng)
    write_parquet(catalogue, out / "catalog.parquet")
    # A small CSV sample: every bad row and random good ones, SAMPLE_ROWS in all, in file order.
    good_positions = np.setdiff1d(np.arange(len(catalogue)), bad_positions)
    sample = np.sort(np.concatenate([
        rng.choice(good_positions, SAMPLE_ROWS - bad_positions.size, replace=False),
        bad_positions,
    ]))
    write_csv(catalogue.iloc[sample], out / "catalog_sample.csv",
              {"ra": "%.6f", "dec": "%.6f", "mag_r": "%.3f", "mag_r_err": "%.3f",
               "z_spec": "%.5f"})

    # -- star catalogue -----------------------------------------------------------------------
    star_rows, dropped_stars, _ = catalogue_rows(mock, footprint, "star")
    stars = pd.DataFrame({"id": np.arange(1, star_rows["ra"].size + 1, dtype=np.int64),
                          **star_rows})
    write_parquet(stars, out / "stars.parquet")

    # -- injections, depth, footprint ---------------------------------------------------------
    inj = mock.injections
    write_csv(inj, out / "injections.csv", {"mag": "%.4f", "ra": "%.6f", "dec": "%.6f"})
    depth = np.where(np.isnan(mock.depth.m50_mag), hp.UNSEEN, np.round(mock.depth.m50_mag, 3))
    hp.write_map(out / "depth.fits", depth, partial=True, overwrite=True, dtype=np.float32,
                 column_names=["M50"], column_units="mag",
                 extra_header=[("COMMENT", f"{SURVEY}: r-band 50% completeness per tile")])
    footprint.write_healpix(out / "footprint.fits", MAP_NSIDE, nest=False, partial=True)
    footprint.write_moc(out / "footprint_moc.fits")

    # -- run files ----------------------------------------------------------------------------
    (out / "survey.toml").write_text(
        runfile_text("survey.toml", box_spec, "catalog.parquet", "galaxies", SPECZ_MAG,
                     (14.0, 24.0, 18.0, 21.8), 22.0), encoding="utf-8")

    # -- the star fields ----------------------------------------------------------------------
    star_truth = build_star_fields(out, small)

    # -- truth --------------------------------------------------------------------------------
    truth = {
        "survey": SURVEY,
        "fictional": True,
        "seed": SEED,
        "small": bool(small),
        "footprint": {
            "box": {"ra": list(box_spec["ra"]), "dec": list(box_spec["dec"])},
            "max_order": MAX_ORDER,
            "n_holes": len(holes),
            "hole_mag_limit": HOLE_MAG,
            "area_deg2": footprint.area_deg2,
            "box_area_deg2": box.area_deg2,
        },
        "catalogue": {
            "file": "catalog.parquet",
            "rows": len(catalogue),
            "rows_valid": len(galaxies),
            "bad_rows": {kind: len(ids) for kind, ids in bad_ids.items()},
            "bad_row_ids": bad_ids,
            "dropped_by_rounding": dropped_galaxies,
            "rows_with_z_spec": int(np.isfinite(galaxies.z_spec).sum()),
            "z_spec_mag_limit": SPECZ_MAG,
        },
        "stars_catalogue": {"file": "stars.parquet", "rows": len(stars),
                            "dropped_by_rounding": dropped_stars},
        "luminosity_function_h_units": {
            "source": "Blanton et al. 2003, ApJ 592, 819 (^0.1r)",
            "phi_star_h3_mpc3": 1.49e-2, "m_star_minus_5logh": -20.44, "alpha": -1.05,
            "h": H,
        },
        "mock": mock.truth.to_dict(),
        "star_fields": star_truth,
        # Parquet and FITS bytes carry the writer's version; the reproduction test compares
        # bytes when these match and decoded content when they do not.
        "written_with": written_with(),
    }
    (out / "truth.json").write_text(json.dumps(truth, indent=1) + "\n", encoding="utf-8")
    if plots:
        make_plots(out, mock, catalogue, holes, footprint, box_spec)
    return truth


# --------------------------------------------------------------------------------------------
def build_star_fields(out, small):
    """The star fields: catalogue, injections, depth, E(B-V) map, run file; their truth."""
    from countscale.mock import expected_counts
    from countscale.skymodel import target_sky_footprint
    from countscale.runfile import FootprintItem, Table

    star_seed = int(np.random.SeedSequence(SEED).spawn(4)[3].generate_state(1)[0])
    footprint, fields = star_field_footprint()
    if small:  # a handful of the fields, for a quick build
        footprint = None
        fields = fields.iloc[[0, 1, 2, 3, 24, 25]].reset_index(drop=True)
        for row in fields.itertuples():
            cap = Footprint.cap(row.ra, row.dec, row.radius, max_order=STAR_MAX_ORDER)
            footprint = cap if footprint is None else footprint | cap
    ebv = synthetic_ebv(EBV_NSIDE)
    hp.write_map(out / "ebv.fits", ebv, overwrite=True, dtype=np.float32,
                 column_names=["EBV"], column_units="mag",
                 extra_header=[("COMMENT", "Synthetic E(B-V) for the fictional demo; not a "
                                           "real dust map")])
    extinction = ExtinctionMap.read(out / "ebv.fits", band=EBV_BAND)
    spec = MockSpec(
        stars=STAR_MODEL,
        measurement=STAR_MEASUREMENT,
        injections=Injections(n=N_STAR_INJECTIONS // (4 if small else 1),
                              mag_range=STAR_INJECTION_MAGS),
        mag_limits=STAR_TRUTH_MAGS,
        seed=star_seed,
        extinction=extinction,
    )
    mock = make_mock(spec, footprint=footprint)
    rows, dropped, _ = catalogue_rows(mock, footprint, "star")
    stars = pd.DataFrame({"id": np.arange(1, rows["ra"].size + 1, dtype=np.int64), **rows})
    write_parquet(stars, out / "star_fields.parquet")
    write_csv(mock.injections, out / "star_injections.csv",
              {"mag": "%.4f", "ra": "%.6f", "dec": "%.6f"})
    depth = np.where(np.isnan(mock.depth.m50_mag), hp.UNSEEN, np.round(mock.depth.m50_mag, 3))
    hp.write_map(out / "star_depth.fits", depth, partial=True, overwrite=True,
                 dtype=np.float32, column_names=["M50"], column_units="mag",
                 extra_header=[("COMMENT", "Fernhollow Star Fields: observed r-band m50")])
    caps = ",\n".join(f"  {{cap = {{ra = {r.ra!r}, dec = {r.dec!r}, radius = {r.radius!r}}}}}"
                      for r in fields.itertuples())
    (out / "stars.toml").write_text(star_runfile_text(caps), encoding="utf-8")

    target_items = (FootprintItem("galactic_latitude_above", Table(b_deg=STAR_TARGET_B)),)
    target = target_sky_footprint(target_items)
    expected = expected_counts(spec, STAR_TRUTH_MAGS, footprint=target)
    truth = mock.truth.to_dict()
    truth.pop("cl", None)
    return {
        "file": "star_fields.parquet",
        "rows": len(stars),
        "dropped_by_rounding": dropped,
        "n_fields": len(fields),
        "fields": fields.to_dict(orient="list"),
        "area_deg2": footprint.area_deg2,
        "extinction_map": {"file": "ebv.fits", "nside": EBV_NSIDE, "band": EBV_BAND,
                           "coefficient": extinction.coefficient,
                           "formula": synthetic_ebv.__doc__.split(": ", 1)[1]},
        "target_sky": {"galactic_latitude_above": STAR_TARGET_B,
                       "area_deg2": target.area_deg2},
        "sky_mag_limit": STAR_SKY_MAG,
        "mag_limits": list(STAR_TRUTH_MAGS),
        "n_expected_target": list(expected["footprint"]["stars"]),
        "n_expected_sky": list(expected["sky"]["stars"]),
        "mock": truth,
    }


def star_runfile_text(caps):
    return f"""# {SURVEY}: the Star Fields (fictional demo; see README.md). Run with:
#   countscale run demo_data/stars.toml
# Paths are relative to this file's folder.

[survey]
name = "{SURVEY} (Star Fields)"
description = "{len(STAR_FIELDS_LB)} small r-band star fields across the sky, m50 ~ {STAR_MEASUREMENT.m50} (a mock)"

[catalog]
paths = ["star_fields.parquet"]
ra = "ra"
dec = "dec"
mag = "mag_r"
mag_error = "mag_r_err"
id = "id"
population = "stars"

[footprint]
max_order = {STAR_MAX_ORDER}
include = [
{caps},
]

[extinction]
map = "ebv.fits"
band = "{EBV_BAND}"

[completeness]
injections = "star_injections.csv"
model = "logistic"
depth_map = "star_depth.fits"

[counts]
bins = {{start = 12.0, stop = 21.0, width = 0.25}}
model = "power_law"
fit_range = [14.0, {STAR_SKY_MAG}]

[sky_model]
likelihood = "negative_binomial"
nside = 64
draws = 4000

[variance]
methods = ["jackknife", "analytic"]
regions = 24

[totals]
whole_sky_mag_limit = {STAR_SKY_MAG}
target_sky = [{{galactic_latitude_above = {STAR_TARGET_B}}}]
stars = true

[cosmology]
name = "Planck18"

[output]
dir = "countscale_demo_out"
"""


# --------------------------------------------------------------------------------------------
def make_plots(out, mock, catalogue, holes, footprint, box_spec):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.patches import Ellipse, Rectangle
    from matplotlib.ticker import MaxNLocator

    metadata = {"Software": None}
    ra_lo, ra_hi = box_spec["ra"]
    dec_lo, dec_hi = box_spec["dec"]
    valid = catalogue[np.isfinite(catalogue.ra) & (catalogue.mag_r < 90)
                      & ~catalogue.id.duplicated()]

    # Footprint, depth and holes; with a zoom at true scale.
    fig, (ax, zoom) = plt.subplots(1, 2, figsize=(13, 6), gridspec_kw={"width_ratios": [1.35, 1]})
    nside = mock.depth.nside
    lon = np.linspace(ra_lo, ra_hi, 700)
    lat = np.linspace(dec_lo, dec_hi, 520)
    grid_ra, grid_dec = np.meshgrid(lon, lat)
    m50 = mock.depth.m50_mag[hp.ang2pix(nside, grid_ra, grid_dec, lonlat=True)]
    image = ax.pcolormesh(lon, lat, m50, cmap="viridis", shading="auto")
    fig.colorbar(image, ax=ax, label="50% completeness magnitude m50 (r, per tile)")
    sizes = 4 + 60 * (holes.radius_arcsec / holes.radius_arcsec.max()) ** 2
    ax.scatter(holes.ra, holes.dec, s=sizes, facecolor="none", edgecolor="red", lw=0.8,
               label=f"{len(holes)} bright-star holes (marker size grows with radius, "
               "not to scale)")
    # Zoom on the largest hole away from the edges, at true scale.
    interior = holes[(holes.ra > ra_lo + 0.3) & (holes.ra < ra_hi - 0.3)
                     & (holes.dec > dec_lo + 0.3) & (holes.dec < dec_hi - 0.3)]
    biggest = interior.loc[interior.radius_arcsec.idxmax()]
    cx, cy, half = float(biggest.ra), float(biggest.dec), 0.08
    half_ra = half / math.cos(math.radians(cy))  # a square on the sky
    ax.add_patch(Rectangle((cx - half_ra, cy - half), 2 * half_ra, 2 * half, fill=False,
                           lw=1.2, edgecolor="white"))
    ax.set_xlim(ra_hi, ra_lo)
    ax.set_ylim(dec_lo, dec_hi)
    ax.set_xlabel("RA [deg]")
    ax.set_ylabel("Dec [deg]")
    ax.set_title(f"{SURVEY}: {footprint.area_deg2:.2f} deg$^2$, depth and holes")
    ax.legend(loc="upper right", fontsize=8, framealpha=0.9)
    near = valid[(np.abs(valid.ra - cx) < half_ra) & (np.abs(valid.dec - cy) < half)]
    zoom.scatter(near.ra, near.dec, s=3, color="k", lw=0)
    for row in holes[(np.abs(holes.ra - cx) < half_ra + 0.05)
                     & (np.abs(holes.dec - cy) < half + 0.05)].itertuples():
        radius = row.radius_arcsec / 3600.0
        zoom.add_patch(Ellipse((row.ra, row.dec), 2 * radius / math.cos(math.radians(row.dec)),
                               2 * radius, fill=False, edgecolor="red", lw=1.0))
    zoom.set_xlim(cx + half_ra, cx - half_ra)
    zoom.set_ylim(cy - half, cy + half)
    zoom.set_aspect(1.0 / math.cos(math.radians(cy)))
    zoom.xaxis.set_major_locator(MaxNLocator(4))
    zoom.set_xlabel("RA [deg]")
    zoom.set_ylabel("Dec [deg]")
    zoom.set_title(f"zoom (white box): {len(near)} galaxies, holes (red) to scale")
    fig.tight_layout()
    fig.savefig(out / "demo_footprint.png", dpi=110, metadata=metadata)
    plt.close(fig)

    # Magnitude distribution against the truth.
    fig, ax = plt.subplots(figsize=(8.5, 5.5))
    area = footprint.area_deg2
    bins = np.arange(14.0, 25.01, 0.2)
    centres = 0.5 * (bins[1:] + bins[:-1])
    counts = np.histogram(valid.mag_r, bins)[0]
    ax.step(centres, counts / area / 0.2, where="mid", color="C0",
            label="galaxies detected (observed r)")
    stars = pd.read_parquet(out / "stars.parquet")
    ax.step(centres, np.histogram(stars.mag_r, bins)[0] / area / 0.2, where="mid", color="C2",
            label="stars detected (stars.parquet)")
    specz = valid[np.isfinite(valid.z_spec)]
    ax.step(centres, np.histogram(specz.mag_r, bins)[0] / area / 0.2, where="mid", color="C1",
            label=f"with z_spec (r <= {SPECZ_MAG})")
    # The true galaxy counts per 0.2 mag from the model (no detection, no noise).
    from countscale.mock import expected_counts

    edges = np.arange(14.0, 25.01, 0.2)
    integral = np.array(expected_counts(MockSpec(galaxies=GALAXIES), tuple(edges))["sky"][
        "galaxies"]) / (4 * math.pi * (180 / math.pi) ** 2)
    ax.plot(centres, np.diff(integral) / 0.2, "k--", lw=1,
            label="true galaxy counts (model, all sources)")
    ax.set_yscale("log")
    ax.set_xlabel("r magnitude")
    ax.set_ylabel("sources per deg$^2$ per mag")
    ax.set_title(f"{SURVEY}: magnitude distribution ({len(valid):,} galaxies)")
    typical = MEASUREMENT.m50
    ax.axvline(typical, color="grey", lw=0.8, ls=":")
    ax.text(typical + 0.05, ax.get_ylim()[0] * 3, f"m50 ~ {typical}", color="grey", fontsize=8)
    ax.legend(fontsize=8, loc="upper left")
    ax.grid(alpha=0.3, which="both")
    fig.tight_layout()
    fig.savefig(out / "demo_magnitudes.png", dpi=110, metadata=metadata)
    plt.close(fig)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", default=str(HERE), help="output folder (default: demo_data/)")
    parser.add_argument("--small", action="store_true", help="a 1.5 deg^2 version (fast)")
    parser.add_argument("--no-plots", action="store_true", help="skip the PNG figures")
    args = parser.parse_args(argv)
    truth = build(args.out, small=args.small, plots=not args.no_plots)
    print(f"{SURVEY}: {truth['footprint']['area_deg2']:.4f} deg^2, "
          f"{truth['catalogue']['rows']} catalogue rows, {truth['stars_catalogue']['rows']} "
          f"stars, {truth['footprint']['n_holes']} holes -> {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
