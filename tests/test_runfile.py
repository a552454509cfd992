"""Tests for countscale.runfile: the run-file schema, its defaults, and its error messages.

The contract checked here is the run file as docs/reference.md describes it (sections, keys,
defaults) and the project's message rule (file, section/key path, rule, value, one line).
TOML parsing itself is Python's tomllib (TOML 1.0.0); cosmology names are checked against
astropy's own list of realisations (astropy.cosmology.realizations.available).
"""

from __future__ import annotations

import dataclasses
import json
import pickle
import re
import textwrap
import tomllib
from pathlib import Path

import pytest

from countscale.catalog import DEFAULT_MAG_RANGE
from countscale.errors import InputError, InputTypeError
from countscale.runfile import (
    ITEM_KINDS,
    SECTIONS,
    FootprintItem,
    RunFile,
    Table,
    load_runfile,
    parse_runfile,
)

# A run file that uses every section and every key, for a fictional survey. Paths are relative
# (resolved against the file's folder) except one absolute catalogue path.
FULL = textwrap.dedent(
    """\
    [survey]
    name = "Lanternfish Deep Field"
    description = "An invented survey used by the tests"

    [catalog]
    paths = ["../cats/part-*.parquet", "/abs/extra.fits"]
    ra = "RA"
    dec = "DEC"
    mag = "MAG_R"
    redshift = "Z_PHOT"
    mag_error = "MAGERR_R"
    stellar_mass = "LOGMSTAR"
    id = "SRC_ID"
    weight = "W"
    population = "galaxies"
    sentinels = [99, -99.0, -1]
    require_redshift = true
    mag_range = [-5.0, 35.0]
    redshift_error = "Z_PHOT_ERR"

    [footprint]
    max_order = 14
    include = [
      {map = "masks/cover.fits", threshold = 0.8, nest = true},
      {moc = "masks/cover_moc.fits"},
      {cap = {ra = 118.0, dec = 17.5, radius = 1.5}},
      {box = {ra = [350, 10], dec = [-5, 5]}},
      {polygon = [[10, 0], [20, 0], [20, 10], [10, 10], [10, 0]]},
      {occupancy = {order = 10, min_count = 3}},
    ]
    exclude = [
      {circles = "holes.csv", columns = {ra = "RA_S", dec = "DEC_S", radius_arcsec = "R_MASK"}},
      {galactic_latitude_below = 20},
      {galactic_latitude_above = 85.5},
    ]

    [completeness]
    injections = "inj/injections.csv"
    model = "fleming"
    plateau = true
    depth_map = "inj/m50.fits"
    columns = {mag = "MAG_IN", recovered = "DETECTED", ra = "RA_IN", dec = "DEC_IN"}

    [counts]
    bins = {start = 18.0, stop = 26.0, width = 0.25}
    model = "broken_power_law"
    fit_range = [19.0, 25.5]
    reference_mag = 22.0
    n_bootstrap = 50

    [luminosity_function]
    methods = ["sty", "vmax"]
    redshift_range = [0.1, 0.9]
    mag_limits = [-24.5, -17]
    kcorrection = {form = "polynomial", coefficients = [0.0, 1.2, -0.3]}
    evolution = {Q = 1.6, P = -0.5}
    quantity = "luminosity"
    model = "schechter"
    fit_evolution = ["Q"]
    bin_width = 0.2
    weight_cap = 4.0
    mass_limit_quantile = 0.9

    [variance]
    methods = ["jackknife"]
    regions = 40
    bias = 1.3
    redshift_median = 0.6
    mag_limit = 24.5
    sigma8 = 0.8
    n_s = 0.96
    wiggles = false

    [totals]
    whole_sky_mag_limit = 24.0
    volume = {redshift = [0.0, 3.0]}
    faint_limit = 30.0
    stars = true
    imf = ["kroupa", "chabrier"]
    mass_imf = "kroupa"
    mass_to_light = {value = 1.7, sigma_dex = 0.1, sun_abs_mag = 4.76, source = "assumed"}
    galaxy_log10_mass = 10.8
    light_cone_z_max = 6.0
    draws = 20000
    target_sky = [{galactic_latitude_above = 30}, {cap = {ra = 10.0, dec = 5.0, radius = 3}}]

    [extinction]
    map = "dust/ebv.fits"
    band = "sdss_r"
    nest = false

    [sky_model]
    mag_limit = 21.5
    covariate_sets = [["log_sin_b"], ["log_sin_b", "cos_l_cos_b", "ebv", "depth"], []]
    maps = [{name = "depth", path = "inj/m50.fits", nest = true, transform = "log"}]
    likelihood = "poisson"
    nside = 32
    draws = 2000

    [contamination]
    star_catalog = ["stars/*.parquet"]
    columns = {ra = "RA_STAR", dec = "DEC_STAR", mag = "R_STAR"}

    [cosmology]
    H0 = 70.0
    Om0 = 0.3

    [output]
    dir = "out/run1"
    formats = ["json", "png"]

    [engine]
    kind = "dask"
    scheduler = "tcp://127.0.0.1:8786"
    chunk_rows = 500_000
    """
)

# Keys that FULL cannot use together with the keys it uses (name excludes H0/Om0).
ALTERNATES = [
    '[cosmology]\nname = "WMAP9"\n',
    # [catalog] classifier and [contamination] both remove stars: one at a time.
    '[catalog]\nclassifier = "P_STAR"\nclassifier_threshold = 0.7\n',
    # [extinction] takes a band name or its coefficient R.
    '[extinction]\nmap = "ebv.fits"\ncoefficient = 2.285\n',
]

MINIMAL = textwrap.dedent(
    """\
    [catalog]
    paths = ["cat.parquet"]
    ra = "ra"
    dec = "dec"
    mag = "mag"

    [footprint]
    include = [{cap = {ra = 10.0, dec = 0.0, radius = 2.0}}]
    """
)

CAP = "{cap = {ra = 10.0, dec = 0.0, radius = 2.0}}"


@pytest.fixture
def full_file(tmp_path: Path) -> Path:
    folder = tmp_path / "runs"
    folder.mkdir()
    path = folder / "survey.toml"
    path.write_text(FULL, encoding="utf-8")
    return path


# --------------------------------------------------------------------------------------------
# Valid files
# --------------------------------------------------------------------------------------------


def test_full_runfile_round_trip(full_file: Path) -> None:
    rf = load_runfile(full_file)
    base = full_file.parent
    assert rf.path == full_file
    assert rf.base_dir == base
    assert rf.present == frozenset(SECTIONS)

    assert rf.survey == {
        "name": "Lanternfish Deep Field",
        "description": "An invented survey used by the tests",
    }

    cat = rf.catalog
    # Globs stay patterns, made absolute against the run file's folder.
    assert cat.paths == (base.parent / "cats" / "part-*.parquet", Path("/abs/extra.fits"))
    assert (cat.ra, cat.dec, cat.mag) == ("RA", "DEC", "MAG_R")
    assert (cat.redshift, cat.mag_error, cat.stellar_mass) == ("Z_PHOT", "MAGERR_R", "LOGMSTAR")
    assert (cat.id, cat.weight, cat.population) == ("SRC_ID", "W", "galaxies")
    assert cat.sentinels == (99.0, -99.0, -1.0)
    assert cat.require_redshift is True
    assert cat.mag_range == (-5.0, 35.0)

    fp = rf.footprint
    assert fp.max_order == 14
    assert [item.kind for item in fp.include] == [
        "map",
        "moc",
        "cap",
        "box",
        "polygon",
        "occupancy",
    ]
    m, moc, cap, box, polygon, occupancy = fp.include
    assert m.params == {"path": base / "masks" / "cover.fits", "threshold": 0.8, "nest": True}
    assert moc.params == {"path": base / "masks" / "cover_moc.fits"}
    assert cap.params == {"ra_deg": 118.0, "dec_deg": 17.5, "radius_deg": 1.5}
    # a > b is kept as written: the box wraps through RA = 0.
    assert box.params == {"ra_deg": (350.0, 10.0), "dec_deg": (-5.0, 5.0)}
    # The closing vertex (equal to the first) is dropped.
    assert polygon.params == {
        "vertices_deg": ((10.0, 0.0), (20.0, 0.0), (20.0, 10.0), (10.0, 10.0))
    }
    assert occupancy.params == {"order": 10, "min_count": 3}
    assert cap.where == f"{full_file}: [footprint] 'include[2]'"

    circles, below, above = fp.exclude
    assert circles.kind == "circles"
    assert circles.params == {
        "path": base / "holes.csv",
        "columns": {"ra": "RA_S", "dec": "DEC_S", "radius_arcsec": "R_MASK"},
    }
    assert (below.kind, below.params) == ("galactic_latitude_below", {"b_deg": 20.0})
    assert (above.kind, above.params) == ("galactic_latitude_above", {"b_deg": 85.5})

    comp = rf.completeness
    assert comp.injections == base / "inj" / "injections.csv"
    assert (comp.model, comp.plateau) == ("fleming", True)
    assert comp.depth_map == base / "inj" / "m50.fits"
    assert comp.columns == {
        "mag": "MAG_IN",
        "recovered": "DETECTED",
        "ra": "RA_IN",
        "dec": "DEC_IN",
    }

    counts = rf.counts
    assert counts.bins == {"start": 18.0, "stop": 26.0, "width": 0.25}
    assert counts.model == "broken_power_law"
    assert counts.fit_range == (19.0, 25.5)
    assert counts.reference_mag == 22.0
    assert counts.n_bootstrap == 50

    lf = rf.luminosity_function
    assert lf.methods == ("sty", "vmax")
    assert lf.redshift_range == (0.1, 0.9)
    assert lf.mag_limits == (-24.5, -17.0)
    assert lf.kcorrection == {"form": "polynomial", "coefficients": (0.0, 1.2, -0.3)}
    assert isinstance(lf.kcorrection, Table)
    assert lf.evolution == {"Q": 1.6, "P": -0.5}
    assert (lf.quantity, lf.model, lf.fit_evolution) == ("luminosity", "schechter", ("Q",))
    assert (lf.bin_width, lf.weight_cap, lf.mass_limit_quantile) == (0.2, 4.0, 0.9)
    assert rf.catalog.redshift_error == "Z_PHOT_ERR"

    assert rf.variance == {"methods": ("jackknife",), "regions": 40, "bias": 1.3,
                           "redshift_median": 0.6, "mag_limit": 24.5, "sigma8": 0.8,
                           "n_s": 0.96, "wiggles": False}
    totals = dict(rf.totals)
    target = totals.pop("target_sky")
    assert totals == {
        "whole_sky_mag_limit": 24.0,
        "volume": {"kind": "redshift", "redshift": (0.0, 3.0)},
        "faint_limit": 30.0,
        "stars": True,
        "imf": ("kroupa", "chabrier"),
        "mass_imf": "kroupa",
        "mass_to_light": {"value": 1.7, "sigma_dex": 0.1, "sun_abs_mag": 4.76,
                          "source": "assumed"},
        "galaxy_log10_mass": 10.8,
        "light_cone_z_max": 6.0,
        "draws": 20000,
    }
    assert [(item.kind, item.params) for item in target] == [
        ("galactic_latitude_above", {"b_deg": 30.0}),
        ("cap", {"ra_deg": 10.0, "dec_deg": 5.0, "radius_deg": 3.0}),
    ]
    assert rf.extinction == {"map": base / "dust" / "ebv.fits", "coefficient": None,
                             "band": "sdss_r", "nest": False}
    sky = rf.sky_model
    assert sky.mag_limit == 21.5
    assert sky.covariate_sets == (("log_sin_b",), ("log_sin_b", "cos_l_cos_b", "ebv", "depth"),
                                  ())
    assert [dict(m) for m in sky.maps] == [{"name": "depth", "path": base / "inj" / "m50.fits",
                                            "nest": True, "transform": "log"}]
    assert (sky.likelihood, sky.nside, sky.draws) == ("poisson", 32, 2000)
    assert rf.contamination.star_catalog == (base / "stars" / "*.parquet",)
    assert rf.contamination.columns == {"ra": "RA_STAR", "dec": "DEC_STAR", "mag": "R_STAR"}
    assert rf.cosmology == {"name": None, "H0": 70.0, "Om0": 0.3}
    assert rf.output == {"dir": base / "out" / "run1", "formats": ("json", "png")}
    assert rf.engine == {"kind": "dask", "scheduler": "tcp://127.0.0.1:8786", "chunk_rows": 500_000}


def test_full_file_uses_every_key_and_item_kind_of_the_schema() -> None:
    # Guards the test above: a key added to the schema must be added to FULL (or ALTERNATES).
    used: set[tuple[str, str]] = set()
    kinds: set[str] = set()
    extras: set[str] = set()
    for text in (FULL, *ALTERNATES):
        for section, table in tomllib.loads(text).items():
            used |= {(section, key) for key in table}
            for item in table.get("include", []) + table.get("exclude", []):
                kinds |= set(item) & set(ITEM_KINDS)
                extras |= set(item) - set(ITEM_KINDS)
    assert used == {(name, key) for name, spec in SECTIONS.items() for key in spec.keys}
    assert kinds == set(ITEM_KINDS)
    assert extras == {name for spec in ITEM_KINDS.values() for name in spec.extras}


def test_parse_and_load_agree(full_file: Path) -> None:
    assert parse_runfile(FULL, full_file) == load_runfile(full_file)
    assert parse_runfile(FULL, str(full_file)) == load_runfile(str(full_file))


def test_defaults_are_filled(tmp_path: Path) -> None:
    # The defaults documented in docs/reference.md.
    rf = parse_runfile(MINIMAL, tmp_path / "survey.toml")
    assert rf.present == {"catalog", "footprint"}
    cat = rf.catalog
    assert cat.population == "galaxies"
    assert cat.sentinels == (99.0, -99.0, 99.99)
    assert cat.require_redshift is False
    assert cat.mag_range == DEFAULT_MAG_RANGE == (-30.0, 40.0)
    assert (cat.redshift, cat.mag_error, cat.stellar_mass, cat.id, cat.weight) == (None,) * 5
    assert rf.footprint.max_order == 16
    assert rf.footprint.exclude == ()
    assert rf.engine == {"kind": "local", "scheduler": None, "chunk_rows": 2_000_000}
    assert rf.output.dir == tmp_path / "countscale_out"
    assert rf.output.formats == ("json", "markdown", "html", "png")
    assert rf.cosmology == {"name": "Planck18", "H0": None, "Om0": None}
    assert rf.variance == {"methods": ("jackknife", "analytic"), "regions": 24, "bias": 1.0,
                           "redshift_median": None, "mag_limit": None, "sigma8": None,
                           "n_s": None, "wiggles": True}


def test_defaults_inside_sections_and_items(tmp_path: Path) -> None:
    text = MINIMAL.replace("[catalog]", '[catalog]\nredshift = "z"') + textwrap.dedent(
        """\
        exclude = [{circles = "holes.csv"}, {occupancy = {order = 8}}, {map = "m.fits"}]

        [completeness]
        injections = "inj.csv"

        [counts]
        bins = {start = 18, stop = 26, width = 0.5}

        [luminosity_function]
        redshift_range = [0.2, 0.5]
        mag_limits = [-23, -18]

        [totals]
        """
    )
    rf = parse_runfile(text, tmp_path / "survey.toml")
    circles, occupancy, m = rf.footprint.exclude
    assert circles.params.columns == {"ra": "ra", "dec": "dec", "radius_arcsec": "radius_arcsec"}
    assert occupancy.params == {"order": 8, "min_count": 1}
    assert m.params == {"path": tmp_path / "m.fits", "threshold": None, "nest": None}
    assert rf.completeness.model == "logistic"
    assert rf.completeness.plateau is False
    assert rf.completeness.depth_map is None
    # Positions are optional: unmapped, columns named "ra"/"dec" are used when present.
    assert rf.completeness.columns == {
        "mag": "mag",
        "recovered": "recovered",
        "ra": None,
        "dec": None,
    }
    assert rf.counts.model == "power_law"
    assert rf.counts.bins == {"start": 18.0, "stop": 26.0, "width": 0.5}
    assert (rf.counts.fit_range, rf.counts.reference_mag) == (None, None)
    assert rf.counts.n_bootstrap == 200
    lf = rf.luminosity_function
    assert lf.methods == ("vmax", "sty", "swml")
    assert lf.kcorrection is None
    assert lf.evolution == {"Q": 0.0, "P": 0.0}
    assert (lf.quantity, lf.model, lf.fit_evolution, lf.bin_width) == (
        "luminosity", "schechter", None, None)
    assert (lf.weight_cap, lf.mass_limit_quantile) == (5.0, 0.95)
    assert rf.totals == {
        "whole_sky_mag_limit": None,
        "volume": None,
        "faint_limit": None,
        "stars": False,
        "imf": "chabrier",
        "mass_imf": "chabrier",
        "mass_to_light": None,
        "galaxy_log10_mass": None,
        "light_cone_z_max": 8.0,
        "draws": 10000,
        "target_sky": None,
    }
    assert "totals" in rf.present


def test_absent_sections_hold_defaults_and_none(tmp_path: Path) -> None:
    rf = parse_runfile("", tmp_path / "empty.toml")
    assert rf.present == frozenset()
    assert set(rf.sections) == set(SECTIONS)
    # Required keys of absent sections are None (they are only required when present).
    assert rf.catalog.paths is None and rf.catalog.ra is None
    assert rf.footprint.include is None
    assert rf.survey.name is None
    assert rf.output.dir == tmp_path / "countscale_out"


def test_relative_paths_are_resolved_against_the_run_file(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("HOME", str(tmp_path / "home"))
    text = MINIMAL.replace(
        'paths = ["cat.parquet"]',
        'paths = ["../data/cat.parquet", "./a/../b/*.fits", "/srv/x/[ab]?.csv", "~/c.csv"]',
    )
    rf = parse_runfile(text, tmp_path / "runs" / "survey.toml")
    assert rf.catalog.paths == (
        tmp_path / "data" / "cat.parquet",
        tmp_path / "runs" / "b" / "*.fits",
        Path("/srv/x/[ab]?.csv"),
        tmp_path / "home" / "c.csv",
    )
    assert all(path.is_absolute() for path in rf.catalog.paths)


def test_relative_run_file_path_gives_absolute_base(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    (tmp_path / "runs").mkdir()
    (tmp_path / "runs" / "survey.toml").write_text(MINIMAL, encoding="utf-8")
    monkeypatch.chdir(tmp_path)
    rf = load_runfile("runs/survey.toml")
    assert rf.label == "runs/survey.toml"
    assert rf.base_dir == tmp_path / "runs"
    assert rf.catalog.paths == (tmp_path / "runs" / "cat.parquet",)


def test_array_of_tables_is_the_same_as_an_inline_list(tmp_path: Path) -> None:
    inline = MINIMAL + 'exclude = [{galactic_latitude_below = 15}, {moc = "holes_moc.fits"}]\n'
    tables = MINIMAL + textwrap.dedent(
        """\
        [[footprint.exclude]]
        galactic_latitude_below = 15
        [[footprint.exclude]]
        moc = "holes_moc.fits"
        """
    )
    path = tmp_path / "survey.toml"
    assert parse_runfile(inline, path) == parse_runfile(tables, path)


def test_cosmology_names_follow_astropy(tmp_path: Path) -> None:
    from astropy.cosmology import realizations

    for name in realizations.available:
        rf = parse_runfile(f'[cosmology]\nname = "{name}"\n', tmp_path / "c.toml")
        assert rf.cosmology == {"name": name, "H0": None, "Om0": None}


def test_volume_forms(tmp_path: Path) -> None:
    rf = parse_runfile('[totals]\nvolume = "observable_universe"\n', tmp_path / "t.toml")
    assert rf.totals.volume == {"kind": "observable_universe", "redshift": None}


def test_bins_accept_decimal_widths(tmp_path: Path) -> None:
    # (26 - 18) / 0.1 is 79.99999999999999 in binary floating point, yet 80 bins.
    rf = parse_runfile("[counts]\nbins = {start = 18, stop = 26, width = 0.1}\n", tmp_path / "c")
    assert rf.counts.bins.width == 0.1


def test_results_are_frozen(tmp_path: Path) -> None:
    rf = parse_runfile(MINIMAL, tmp_path / "survey.toml")
    with pytest.raises(dataclasses.FrozenInstanceError):
        rf.path = tmp_path  # type: ignore[misc]
    with pytest.raises(AttributeError, match="read-only"):
        rf.catalog.ra = "x"
    with pytest.raises(TypeError):
        rf.catalog["ra"] = "x"  # type: ignore[index]
    with pytest.raises(dataclasses.FrozenInstanceError):
        rf.footprint.include[0].kind = "box"  # type: ignore[misc]
    assert isinstance(rf.footprint.include, tuple)
    assert isinstance(rf.footprint.include[0], FootprintItem)
    with pytest.raises(AttributeError, match="no attribute or section 'catalogue'"):
        rf.catalogue  # noqa: B018
    assert hash(rf) == hash(parse_runfile(MINIMAL, tmp_path / "survey.toml"))


def test_pickle_and_json(full_file: Path) -> None:
    rf = load_runfile(full_file)
    assert pickle.loads(pickle.dumps(rf)) == rf
    plain = json.loads(json.dumps(rf.to_dict()))
    assert plain["sections"]["footprint"]["include"][2] == {
        "kind": "cap",
        "ra_deg": 118.0,
        "dec_deg": 17.5,
        "radius_deg": 1.5,
    }
    assert plain["sections"]["catalog"]["paths"][1] == "/abs/extra.fits"
    assert plain["present"] == sorted(SECTIONS)


def test_require_and_location(tmp_path: Path) -> None:
    rf = parse_runfile(MINIMAL, "runs/survey.toml")
    assert rf.require("catalog", "footprint") is rf
    with pytest.raises(
        InputError, match=r"^runs/survey\.toml: missing required section \[counts\]$"
    ):
        rf.require("catalog", "counts")
    with pytest.raises(
        InputError,
        match=r"^runs/survey\.toml: missing required section \[footprint\] "
        r"\(needed by countscale run\)$",
    ):
        parse_runfile(MINIMAL.split("[footprint]")[0], "runs/survey.toml").require(
            "catalog", "footprint", needed_by="countscale run"
        )
    # A misspelt section name is a programming error, not an input error.
    with pytest.raises(ValueError, match="`names` must be run-file sections") as excinfo:
        rf.require("catalogue")
    assert not isinstance(excinfo.value, InputError)
    assert rf.location("catalog", "paths") == "runs/survey.toml: [catalog] 'paths'"
    assert rf.location("footprint") == "runs/survey.toml: [footprint]"


# --------------------------------------------------------------------------------------------
# Bad input: one table, every message pinned
# --------------------------------------------------------------------------------------------

F = "survey.toml"
CATALOG_Z = '[catalog]\npaths = ["c.parquet"]\nra = "ra"\ndec = "dec"\nmag = "m"\nredshift = "z"\n'
LF_SECTION = "[luminosity_function]\nredshift_range = [0.01, 0.3]\nmag_limits = [12.0, 19.8]\n"


def exact(message: str) -> str:
    return "^" + re.escape(message) + "$"


def footprint(items: str, extra: str = "", list_name: str = "include") -> str:
    if list_name == "include":
        return f"[footprint]\n{extra}include = [{items}]\n"
    return f"[footprint]\n{extra}include = [{CAP}]\nexclude = [{items}]\n"


BAD = [
    # -- sections -------------------------------------------------------------------------
    (
        "unknown-section",
        "[footprnt]\nmax_order = 3\n",
        InputError,
        exact(f"{F}: unknown section [footprnt]; did you mean [footprint]?"),
    ),
    (
        "unknown-section-no-suggestion",
        "[widgets]\na = 1\n",
        InputError,
        r"^survey\.toml: unknown section \[widgets\]; expected one of \[survey\], \[catalog\],"
        r" .*, \[engine\]$",
    ),
    (
        "key-outside-sections",
        'name = "Lanternfish"\n[catalog]\n',
        InputError,
        exact(f"{F}: key 'name' is outside any section; did you mean [survey] 'name'?"),
    ),
    (
        "section-not-a-table",
        'survey = "Lanternfish"\n',
        InputTypeError,
        exact(f'{F}: [survey] must be a table (a section); got "Lanternfish"'),
    ),
    # -- unknown keys -----------------------------------------------------------------------
    (
        "unknown-key-suggestion",
        footprint(CAP, extra="max_ordr = 12\n"),
        InputError,
        exact(f"{F}: [footprint] unknown key 'max_ordr'; did you mean 'max_order'?"),
    ),
    (
        "unknown-key-no-suggestion",
        '[engine]\ncolour = "red"\n',
        InputError,
        exact(
            f"{F}: [engine] unknown key 'colour'; expected one of 'kind', 'scheduler', 'chunk_rows'"
        ),
    ),
    (
        "unknown-key-case",
        "[cosmology]\nh0 = 70\nOm0 = 0.3\n",
        InputError,
        exact(f"{F}: [cosmology] unknown key 'h0'; did you mean 'H0'?"),
    ),
    (
        "unknown-key-in-cap",
        footprint("{cap = {ra = 10, dec = 0, rdius = 2}}"),
        InputError,
        exact(f"{F}: [footprint] unknown key 'include[0].cap.rdius'; did you mean 'radius'?"),
    ),
    (
        "unknown-sibling-of-map",
        footprint(f'{CAP}, {{map = "m.fits", treshold = 0.5}}'),
        InputError,
        exact(f"{F}: [footprint] unknown key 'include[1].treshold'; did you mean 'threshold'?"),
    ),
    (
        "sibling-not-allowed-for-kind",
        footprint("{cap = {ra = 10, dec = 0, radius = 2}, threshold = 0.5}"),
        InputError,
        exact(f"{F}: [footprint] unknown key 'include[0].threshold'; expected one of 'cap'"),
    ),
    (
        "unknown-kind",
        footprint('{circle = "holes.csv"}', list_name="exclude"),
        InputError,
        exact(f"{F}: [footprint] unknown key 'exclude[0].circle'; did you mean 'circles'?"),
    ),
    (
        "unknown-circles-column",
        footprint('{circles = "h.csv", columns = {radius = "R"}}', list_name="exclude"),
        InputError,
        exact(
            f"{F}: [footprint] unknown key 'exclude[0].columns.radius';"
            " did you mean 'radius_arcsec'?"
        ),
    ),
    (
        "unknown-evolution-key",
        "[luminosity_function]\nredshift_range = [0.1, 0.5]\nmag_limits = [-23, -18]\n"
        "evolution = {q = 1.0}\n",
        InputError,
        exact(f"{F}: [luminosity_function] unknown key 'evolution.q'; did you mean 'Q'?"),
    ),
    # -- footprint items --------------------------------------------------------------------
    (
        "two-kind-keys",
        footprint(f"{CAP}, {{cap = {{ra = 1, dec = 2, radius = 3}}, box = {{ra = [1, 2]}}}}"),
        InputError,
        r"^survey\.toml: \[footprint\] 'include\[1\]' must be a table with exactly one kind key,"
        r" one of 'map', 'moc', 'cap', .*'occupancy'; got 'cap' and 'box'$",
    ),
    (
        "no-kind-key",
        footprint("{threshold = 0.5}"),
        InputError,
        r"^survey\.toml: \[footprint\] 'include\[0\]' must be a table with exactly one kind key,"
        r" one of .*; got none \(keys: 'threshold'\)$",
    ),
    (
        "empty-item",
        footprint("{}"),
        InputError,
        r"^survey\.toml: \[footprint\] 'include\[0\]' .*; got an empty table \{\}$",
    ),
    (
        "item-not-a-table",
        footprint('"mask.fits"'),
        InputTypeError,
        r"^survey\.toml: \[footprint\] 'include\[0\]' must be a table with exactly one kind key,"
        r' .*; got "mask\.fits"$',
    ),
    (
        "include-empty",
        "[footprint]\ninclude = []\n",
        InputError,
        exact(
            f"{F}: [footprint] 'include' must be a list of footprint items such as"
            " {cap = {ra = , dec = , radius = }} (at least 1); got []"
        ),
    ),
    (
        "include-missing",
        "[footprint]\nmax_order = 10\n",
        InputError,
        exact(f"{F}: [footprint] missing required key 'include'"),
    ),
    (
        "max-order-type",
        footprint(CAP, extra='max_order = "16"\n'),
        InputTypeError,
        exact(f"{F}: [footprint] 'max_order' must be an integer in [0, 28]; got \"16\""),
    ),
    (
        # Order 29 is the MOC standard's deepest, but the footprint cannot be built there.
        "max-order-range",
        footprint(CAP, extra="max_order = 29\n"),
        InputError,
        exact(f"{F}: [footprint] 'max_order' must be an integer in [0, 28]; got 29"),
    ),
    (
        "cap-radius-negative",
        footprint("{cap = {ra = 10, dec = 0, radius = -3.0}}"),
        InputError,
        exact(
            f"{F}: [footprint] 'include[0].cap.radius' must be a number in (0, 180] degrees;"
            " got -3.0"
        ),
    ),
    (
        "cap-radius-zero",
        footprint("{cap = {ra = 10, dec = 0, radius = 0}}"),
        InputError,
        exact(
            f"{F}: [footprint] 'include[0].cap.radius' must be a number in (0, 180] degrees; got 0"
        ),
    ),
    (
        "cap-radius-inf",
        footprint("{cap = {ra = 10, dec = 0, radius = inf}}"),
        InputError,
        exact(
            f"{F}: [footprint] 'include[0].cap.radius' must be a number in (0, 180] degrees;"
            " got inf"
        ),
    ),
    (
        "cap-dec-range",
        footprint(f"{CAP}, {CAP}, {{cap = {{ra = 10, dec = 95, radius = 1}}}}"),
        InputError,
        exact(
            f"{F}: [footprint] 'include[2].cap.dec' must be a number in [-90, 90] degrees; got 95"
        ),
    ),
    (
        "cap-missing-radius",
        footprint("{cap = {ra = 10, dec = 0}}"),
        InputError,
        exact(f"{F}: [footprint] missing required key 'include[0].cap.radius'"),
    ),
    (
        "cap-not-a-table",
        footprint("{cap = [10, 0, 2]}"),
        InputTypeError,
        exact(
            f"{F}: [footprint] 'include[0].cap' must be a table {{ra = , dec = , radius = }}"
            " in degrees; got [10, 0, 2]"
        ),
    ),
    (
        "box-dec-decreasing",
        footprint("{box = {ra = [10, 20], dec = [5, -5]}}"),
        InputError,
        exact(
            f"{F}: [footprint] 'include[0].box.dec' must be two increasing declinations [c, d]"
            " in [-90, 90] degrees; got [5, -5]"
        ),
    ),
    (
        "box-ra-equal",
        footprint("{box = {ra = [10, 10], dec = [-5, 5]}}"),
        InputError,
        exact(
            f"{F}: [footprint] 'include[0].box.ra' must be two right ascensions [a, b] in"
            " [0, 360] degrees with a != b (a > b wraps through 0); got [10, 10]"
        ),
    ),
    (
        "box-ra-range",
        footprint("{box = {ra = [-10, 10], dec = [-5, 5]}}"),
        InputError,
        r"^survey\.toml: \[footprint\] 'include\[0\]\.box\.ra' must be two right ascensions"
        r" .*; got \[-10, 10\]$",
    ),
    (
        "polygon-two-vertices",
        footprint("{polygon = [[0, 0], [1, 1]]}"),
        InputError,
        exact(
            f"{F}: [footprint] 'include[0].polygon' must be a list of at least 3 vertices"
            " [ra, dec] in degrees; got [[0, 0], [1, 1]]"
        ),
    ),
    (
        "polygon-closed-but-two-distinct",
        footprint("{polygon = [[0, 0], [1, 0], [0, 0]]}"),
        InputError,
        r"^survey\.toml: \[footprint\] 'include\[0\]\.polygon' must be a list of at least 3"
        r" vertices .*; got \[\[0, 0\], \[1, 0\], \[0, 0\]\]$",
    ),
    (
        "polygon-vertex-dec",
        footprint("{polygon = [[0, 0], [1, 0], [5, 91]]}"),
        InputError,
        exact(
            f"{F}: [footprint] 'include[0].polygon[2]' must be a vertex [ra, dec] with ra in"
            " [0, 360] and dec in [-90, 90] degrees; got [5, 91]"
        ),
    ),
    (
        "polygon-vertex-type",
        footprint('{polygon = [[0, 0], [1, 0], ["5h", 10]]}'),
        InputTypeError,
        r"^survey\.toml: \[footprint\] 'include\[0\]\.polygon\[2\]' must be a vertex .*;"
        r' got \["5h", 10\]$',
    ),
    (
        "galactic-latitude-range",
        footprint("{galactic_latitude_below = 95}", list_name="exclude"),
        InputError,
        exact(
            f"{F}: [footprint] 'exclude[0].galactic_latitude_below' must be a number in [0, 90]"
            " degrees; got 95"
        ),
    ),
    (
        "occupancy-finer-than-max-order",
        footprint("{occupancy = {order = 10}}", extra="max_order = 8\n"),
        InputError,
        exact(f"{F}: [footprint] 'include[0].occupancy.order' must be <= max_order (8); got 10"),
    ),
    (
        "occupancy-min-count",
        footprint("{occupancy = {order = 10, min_count = 0}}"),
        InputError,
        exact(f"{F}: [footprint] 'include[0].occupancy.min_count' must be an integer >= 1; got 0"),
    ),
    (
        "occupancy-missing-order",
        footprint("{occupancy = {min_count = 2}}"),
        InputError,
        exact(f"{F}: [footprint] missing required key 'include[0].occupancy.order'"),
    ),
    (
        "map-threshold-type",
        footprint('{map = "m.fits", threshold = "half"}'),
        InputTypeError,
        exact(f"{F}: [footprint] 'include[0].threshold' must be a finite number; got \"half\""),
    ),
    (
        "map-nest-type",
        footprint('{map = "m.fits", nest = "yes"}'),
        InputTypeError,
        exact(f"{F}: [footprint] 'include[0].nest' must be true or false; got \"yes\""),
    ),
    (
        "map-path-empty",
        footprint('{map = ""}'),
        InputError,
        exact(
            f"{F}: [footprint] 'include[0].map' must be a file path (a non-empty string); got \"\""
        ),
    ),
    # -- catalog ------------------------------------------------------------------------------
    (
        "paths-empty",
        '[catalog]\npaths = []\nra = "ra"\ndec = "dec"\nmag = "mag"\n',
        InputError,
        exact(
            f"{F}: [catalog] 'paths' must be a list of file paths or glob patterns (at least one);"
            " got []"
        ),
    ),
    (
        "paths-a-string",
        '[catalog]\npaths = "cat.parquet"\nra = "ra"\ndec = "dec"\nmag = "mag"\n',
        InputTypeError,
        exact(
            f"{F}: [catalog] 'paths' must be a list of file paths or glob patterns (at least one);"
            ' got "cat.parquet"'
        ),
    ),
    (
        "paths-item-empty",
        '[catalog]\npaths = ["a.parquet", " "]\nra = "ra"\ndec = "dec"\nmag = "mag"\n',
        InputError,
        exact(
            f"{F}: [catalog] 'paths[1]' must be a file path or glob pattern (a non-empty string);"
            ' got " "'
        ),
    ),
    (
        "catalog-missing-ra",
        '[catalog]\npaths = ["a.parquet"]\ndec = "dec"\nmag = "mag"\n',
        InputError,
        exact(f"{F}: [catalog] missing required key 'ra'"),
    ),
    (
        "catalog-column-type",
        '[catalog]\npaths = ["a.parquet"]\nra = 3\ndec = "dec"\nmag = "mag"\n',
        InputTypeError,
        exact(f"{F}: [catalog] 'ra' must be a column name (a non-empty string); got 3"),
    ),
    (
        "population-choice",
        MINIMAL.replace('mag = "mag"', 'mag = "mag"\npopulation = "galaxy"'),
        InputError,
        exact(
            f'{F}: [catalog] \'population\' must be one of "galaxies", "stars"; got "galaxy";'
            ' did you mean "galaxies"?'
        ),
    ),
    (
        "sentinels-type",
        MINIMAL.replace('mag = "mag"', 'mag = "mag"\nsentinels = [99, "none"]'),
        InputTypeError,
        exact(
            f"{F}: [catalog] 'sentinels' must be a list of finite numbers (magnitudes meaning"
            " 'no measurement'); got [99, \"none\"]"
        ),
    ),
    (
        "sentinels-nan",
        MINIMAL.replace('mag = "mag"', 'mag = "mag"\nsentinels = [99, nan]'),
        InputError,
        r"^survey\.toml: \[catalog\] 'sentinels' must be a list of finite numbers .*;"
        r" got \[99, nan\]$",
    ),
    (
        "mag-range-order",
        MINIMAL.replace('mag = "mag"', 'mag = "mag"\nmag_range = [40, -30]'),
        InputError,
        exact(
            f"{F}: [catalog] 'mag_range' must be two magnitudes [lo, hi] with lo < hi (the"
            " plausible range, AB); got [40, -30]"
        ),
    ),
    (
        "mag-range-type",
        MINIMAL.replace('mag = "mag"', 'mag = "mag"\nmag_range = 40'),
        InputTypeError,
        exact(
            f"{F}: [catalog] 'mag_range' must be two magnitudes [lo, hi] with lo < hi (the"
            " plausible range, AB); got 40"
        ),
    ),
    (
        "require-redshift-type",
        MINIMAL.replace('mag = "mag"', 'mag = "mag"\nrequire_redshift = 1'),
        InputTypeError,
        exact(f"{F}: [catalog] 'require_redshift' must be true or false; got 1"),
    ),
    # -- survey -------------------------------------------------------------------------------
    (
        "survey-missing-name",
        '[survey]\ndescription = "x"\n',
        InputError,
        exact(f"{F}: [survey] missing required key 'name'"),
    ),
    (
        "survey-name-empty",
        '[survey]\nname = ""\n',
        InputError,
        exact(f"{F}: [survey] 'name' must be a non-empty string; got \"\""),
    ),
    # -- completeness ---------------------------------------------------------------------
    (
        "completeness-missing-injections",
        '[completeness]\nmodel = "logistic"\n',
        InputError,
        exact(f"{F}: [completeness] missing required key 'injections'"),
    ),
    (
        "completeness-model-choice",
        '[completeness]\ninjections = "i.csv"\nmodel = "fleminng"\n',
        InputError,
        exact(
            f'{F}: [completeness] \'model\' must be one of "logistic", "fleming", "monotone";'
            ' got "fleminng"; did you mean "fleming"?'
        ),
    ),
    (
        "completeness-columns-type",
        '[completeness]\ninjections = "i.csv"\ncolumns = ["mag"]\n',
        InputTypeError,
        exact(f"{F}: [completeness] 'columns' must be a table; got [\"mag\"]"),
    ),
    # -- counts -------------------------------------------------------------------------------
    (
        "fit-range-decreasing",
        "[counts]\nbins = {start = 18, stop = 26, width = 0.5}\nfit_range = [25.0, 20.0]\n",
        InputError,
        exact(f"{F}: [counts] 'fit_range' must be two increasing magnitudes; got [25.0, 20.0]"),
    ),
    (
        "fit-range-type",
        '[counts]\nbins = {start = 18, stop = 26, width = 0.5}\nfit_range = "20-25"\n',
        InputTypeError,
        exact(f"{F}: [counts] 'fit_range' must be two increasing magnitudes; got \"20-25\""),
    ),
    (
        "fit-range-three",
        "[counts]\nbins = {start = 18, stop = 26, width = 0.5}\nfit_range = [19, 20, 21]\n",
        InputError,
        exact(f"{F}: [counts] 'fit_range' must be two increasing magnitudes; got [19, 20, 21]"),
    ),
    (
        "fit-range-outside-bins",
        "[counts]\nbins = {start = 18, stop = 26, width = 0.5}\nfit_range = [17.0, 25.0]\n",
        InputError,
        exact(f"{F}: [counts] 'fit_range' must lie within the bins [18, 26]; got [17.0, 25.0]"),
    ),
    (
        "bins-stop-before-start",
        "[counts]\nbins = {start = 18, stop = 17.0, width = 0.5}\n",
        InputError,
        exact(f"{F}: [counts] 'bins.stop' must be greater than start (18); got 17.0"),
    ),
    (
        "bins-width-zero",
        "[counts]\nbins = {start = 18, stop = 26, width = 0}\n",
        InputError,
        exact(f"{F}: [counts] 'bins.width' must be a number > 0; got 0"),
    ),
    (
        "counts-n-bootstrap-negative",
        "[counts]\nbins = {start = 18, stop = 26, width = 0.5}\nn_bootstrap = -1\n",
        InputError,
        exact(f"{F}: [counts] 'n_bootstrap' must be an integer in [0, 100000]; got -1"),
    ),
    (
        "bins-too-many",
        "[counts]\nbins = {start = 14, stop = 24, width = 5e-10}\n",
        InputError,
        exact(
            f"{F}: [counts] 'bins.width' must divide stop - start (10) into at most 1000 bins"
            " (it gives 2e+10); got 5e-10"
        ),
    ),
    (
        "bins-width-not-dividing",
        "[counts]\nbins = {start = 18, stop = 26, width = 0.3}\n",
        InputError,
        exact(
            f"{F}: [counts] 'bins.width' must divide stop - start (8) into a whole number of"
            " bins; got 0.3"
        ),
    ),
    (
        "reference-mag-nan",
        "[counts]\nbins = {start = 18, stop = 26, width = 0.5}\nreference_mag = nan\n",
        InputError,
        exact(f"{F}: [counts] 'reference_mag' must be a finite number; got nan"),
    ),
    (
        "bins-missing-width",
        "[counts]\nbins = {start = 18, stop = 26}\n",
        InputError,
        exact(f"{F}: [counts] missing required key 'bins.width'"),
    ),
    (
        "counts-missing-bins",
        '[counts]\nmodel = "power_law"\n',
        InputError,
        exact(f"{F}: [counts] missing required key 'bins'"),
    ),
    (
        "counts-model-choice",
        '[counts]\nbins = {start = 18, stop = 26, width = 0.5}\nmodel = "powerlaw"\n',
        InputError,
        exact(
            f'{F}: [counts] \'model\' must be one of "power_law", "broken_power_law",'
            ' "double_power_law"; got "powerlaw"; did you mean "power_law"?'
        ),
    ),
    # -- luminosity function -------------------------------------------------------------
    (
        "lf-method-choice",
        '[luminosity_function]\nmethods = ["vmax", "swlm"]\nredshift_range = [0.1, 0.5]\n'
        "mag_limits = [-23, -18]\n",
        InputError,
        exact(
            f'{F}: [luminosity_function] \'methods[1]\' must be one of "vmax", "sty", "swml";'
            ' got "swlm"; did you mean "swml"?'
        ),
    ),
    (
        "lf-method-duplicate",
        '[luminosity_function]\nmethods = ["sty", "sty"]\nredshift_range = [0.1, 0.5]\n'
        "mag_limits = [-23, -18]\n",
        InputError,
        exact(
            f"{F}: [luminosity_function] 'methods' must be a non-empty list of distinct names"
            ' from "vmax", "sty", "swml"; got ["sty", "sty"]'
        ),
    ),
    (
        "lf-methods-empty",
        "[luminosity_function]\nmethods = []\nredshift_range = [0.1, 0.5]\n"
        "mag_limits = [-23, -18]\n",
        InputError,
        r"^survey\.toml: \[luminosity_function\] 'methods' must be a non-empty list .*; got \[\]$",
    ),
    (
        "lf-redshift-negative",
        "[luminosity_function]\nredshift_range = [-0.1, 1]\nmag_limits = [-23, -18]\n",
        InputError,
        exact(
            f"{F}: [luminosity_function] 'redshift_range' must be two increasing redshifts"
            " [a, b] with 0 <= a < b; got [-0.1, 1]"
        ),
    ),
    (
        "lf-mag-limits-order",
        "[luminosity_function]\nredshift_range = [0.1, 1]\nmag_limits = [-17, -24]\n",
        InputError,
        exact(
            f"{F}: [luminosity_function] 'mag_limits' must be two magnitudes [bright, faint]"
            " with bright < faint; got [-17, -24]"
        ),
    ),
    (
        "lf-kcorrection-type",
        "[luminosity_function]\nredshift_range = [0.1, 1]\nmag_limits = [-24, -17]\n"
        'kcorrection = "none"\n',
        InputTypeError,
        exact(f"{F}: [luminosity_function] 'kcorrection' must be a table; got \"none\""),
    ),
    (
        "lf-needs-redshift-column",
        MINIMAL + "[luminosity_function]\nredshift_range = [0.1, 1]\nmag_limits = [-24, -17]\n",
        InputError,
        exact(
            f"{F}: [luminosity_function] needs a redshift per source;"
            " got no [catalog] 'redshift' column"
        ),
    ),
    (
        "double-schechter-needs-masses",
        MINIMAL + "[luminosity_function]\nredshift_range = [0.1, 1]\nmag_limits = [14, 19]\n"
        'model = "double_schechter"\n',
        InputError,
        exact(
            f"{F}: [luminosity_function] 'model' is a stellar-mass form (Baldry et al. 2012); "
            'it needs quantity = "stellar_mass"; got "double_schechter"'
        ),
    ),
    (
        "fit-evolution-of-a-mass-function",
        MINIMAL + "[luminosity_function]\nredshift_range = [0.1, 1]\nmag_limits = [14, 19]\n"
        'quantity = "stellar_mass"\nfit_evolution = ["Q"]\n',
        InputError,
        exact(
            f"{F}: [luminosity_function] 'fit_evolution' applies to luminosity functions; "
            'quantity is "stellar_mass"; got ["Q"]'
        ),
    ),
    (
        "luminosity-evolution-of-a-mass-function",
        MINIMAL + "[luminosity_function]\nredshift_range = [0.1, 1]\nmag_limits = [14, 19]\n"
        'quantity = "stellar_mass"\nevolution = {Q = 1.0}\n',
        InputError,
        exact(
            f"{F}: [luminosity_function] 'evolution' Q applies to luminosity functions "
            '(quantity is "stellar_mass"); give Q = 0; got 1.0'
        ),
    ),
    (
        "mass-function-needs-mass-column",
        MINIMAL.replace('mag = "mag"', 'mag = "mag"\nredshift = "z"')
        + "[luminosity_function]\nredshift_range = [0.1, 1]\nmag_limits = [14, 19]\n"
        'quantity = "stellar_mass"\n',
        InputError,
        exact(
            f'{F}: [luminosity_function] quantity = "stellar_mass" needs a stellar mass per '
            "source; got no [catalog] 'stellar_mass' column"
        ),
    ),
    (
        "weight-cap-below-one",
        MINIMAL.replace('mag = "mag"', 'mag = "mag"\nredshift = "z"')
        + "[luminosity_function]\nredshift_range = [0.1, 1]\nmag_limits = [14, 19]\n"
        "weight_cap = 0.5\n",
        InputError,
        exact(f"{F}: [luminosity_function] 'weight_cap' must be a number >= 1; got 0.5"),
    ),
    # -- variance -----------------------------------------------------------------------------
    (
        "variance-regions-range",
        "[variance]\nregions = 1\n",
        InputError,
        exact(f"{F}: [variance] 'regions' must be an integer in [2, 1000]; got 1"),
    ),
    (
        "variance-regions-too-many",
        "[variance]\nregions = 100000\n",
        InputError,
        exact(f"{F}: [variance] 'regions' must be an integer in [2, 1000]; got 100000"),
    ),
    (
        "variance-regions-bool",
        "[variance]\nregions = true\n",
        InputTypeError,
        exact(f"{F}: [variance] 'regions' must be an integer in [2, 1000]; got true"),
    ),
    (
        "variance-bias-zero",
        "[variance]\nbias = 0\n",
        InputError,
        exact(f"{F}: [variance] 'bias' must be a number > 0; got 0"),
    ),
    (
        "variance-method-choice",
        '[variance]\nmethods = ["bootstrap"]\n',
        InputError,
        exact(
            f'{F}: [variance] \'methods[0]\' must be one of "jackknife", "analytic";'
            ' got "bootstrap"'
        ),
    ),
    (
        "variance-redshift-median-zero",
        "[variance]\nredshift_median = 0\n",
        InputError,
        exact(f"{F}: [variance] 'redshift_median' must be a number in (0, 20]; got 0"),
    ),
    (
        "variance-sigma8-text",
        '[variance]\nsigma8 = "high"\n',
        InputTypeError,
        exact(f'{F}: [variance] \'sigma8\' must be a number in (0, 3]; got "high"'),
    ),
    (
        "variance-n-s-range",
        "[variance]\nn_s = 2\n",
        InputError,
        exact(f"{F}: [variance] 'n_s' must be a number in (0, 2); got 2"),
    ),
    (
        "variance-wiggles-text",
        '[variance]\nwiggles = "yes"\n',
        InputTypeError,
        exact(f'{F}: [variance] \'wiggles\' must be true or false; got "yes"'),
    ),
    # -- totals -------------------------------------------------------------------------------
    (
        "volume-choice",
        '[totals]\nvolume = "observable universe"\n',
        InputError,
        exact(
            f"{F}: [totals] 'volume' must be \"observable_universe\" or a table"
            ' {redshift = [a, b]} with 0 <= a < b; got "observable universe";'
            ' did you mean "observable_universe"?'
        ),
    ),
    (
        "volume-type",
        "[totals]\nvolume = 3\n",
        InputTypeError,
        r"^survey\.toml: \[totals\] 'volume' must be \"observable_universe\" or a table .*; got 3$",
    ),
    (
        "volume-redshift-order",
        "[totals]\nvolume = {redshift = [1, 0.5]}\n",
        InputError,
        exact(
            f"{F}: [totals] 'volume.redshift' must be two increasing redshifts [a, b] with"
            " 0 <= a < b; got [1, 0.5]"
        ),
    ),
    (
        "volume-unknown-key",
        "[totals]\nvolume = {z = [0, 1]}\n",
        InputError,
        exact(f"{F}: [totals] unknown key 'volume.z'; expected one of 'redshift'"),
    ),
    (
        "imf-choice",
        '[totals]\nimf = "kroupa01"\n',
        InputError,
        exact(
            f'{F}: [totals] \'imf\' must be one of "kroupa", "chabrier", "salpeter";'
            ' got "kroupa01"; did you mean "kroupa"?'
        ),
    ),
    (
        "imf-list-repeated",
        '[totals]\nimf = ["kroupa", "kroupa"]\n',
        InputError,
        exact(f'{F}: [totals] \'imf\' must be a non-empty list of distinct names from "kroupa",'
              ' "chabrier", "salpeter"; got ["kroupa", "kroupa"]'),
    ),
    (
        "imf-type",
        "[totals]\nimf = 3\n",
        InputTypeError,
        exact(f'{F}: [totals] \'imf\' must be an IMF name or a list of distinct IMF names from'
              ' "kroupa", "chabrier", "salpeter"; got 3'),
    ),
    (
        "mass-to-light-without-source",
        "[totals]\nmass_to_light = {value = 1.7, sigma_dex = 0.1, sun_abs_mag = 4.76}\n",
        InputError,
        exact(f"{F}: [totals] missing required key 'mass_to_light.source'"),
    ),
    (
        "mass-to-light-negative",
        '[totals]\nmass_to_light = {value = -1, sigma_dex = 0.1, sun_abs_mag = 4.76, '
        'source = "assumed"}\n',
        InputError,
        exact(f"{F}: [totals] 'mass_to_light.value' must be a number > 0 (Msun / Lsun); "
              "got -1"),
    ),
    (
        "draws-too-few",
        "[totals]\ndraws = 10\n",
        InputError,
        exact(f"{F}: [totals] 'draws' must be an integer in [1000, 1000000]; got 10"),
    ),
    (
        "light-cone-z-max-zero",
        "[totals]\nlight_cone_z_max = 0\n",
        InputError,
        exact(f"{F}: [totals] 'light_cone_z_max' must be a number in (0, 30]; got 0"),
    ),
    (
        "volume-without-luminosity-function",
        CATALOG_Z + '[totals]\nvolume = "observable_universe"\nfaint_limit = -17\n',
        InputError,
        exact(f"{F}: [totals] 'volume' needs a [luminosity_function] section (the number "
              "density comes from its fit); got none"),
    ),
    (
        "volume-without-faint-limit",
        CATALOG_Z + LF_SECTION + '[totals]\nvolume = "observable_universe"\n',
        InputError,
        exact(f"{F}: [totals] 'volume' needs 'faint_limit' (an absolute magnitude, or a log10 "
              "stellar mass for a mass function); got none"),
    ),
    (
        "volume-for-stars",
        CATALOG_Z.replace('redshift = "z"', 'population = "stars"')
        + '[totals]\nvolume = "observable_universe"\nfaint_limit = -17\n',
        InputError,
        exact(f"{F}: [totals] 'volume' totals over a volume apply to galaxies; got [catalog] "
              'population = "stars"'),
    ),
    (
        "stars-without-volume",
        CATALOG_Z + "[totals]\nstars = true\n",
        InputError,
        exact(f"{F}: [totals] 'stars' = true counts the stars in 'volume'; got no 'volume'"),
    ),
    (
        "stars-without-mass-to-light",
        CATALOG_Z + LF_SECTION
        + '[totals]\nstars = true\nvolume = "observable_universe"\nfaint_limit = -17\n',
        InputError,
        exact(f"{F}: [totals] 'stars' = true with a luminosity function needs "
              "'mass_to_light' (light is not mass); got none"),
    ),
    (
        "stars-type",
        '[totals]\nstars = "yes"\n',
        InputTypeError,
        exact(f"{F}: [totals] 'stars' must be true or false; got \"yes\""),
    ),
    (
        "whole-sky-limit-type",
        '[totals]\nwhole_sky_mag_limit = "24"\n',
        InputTypeError,
        exact(f"{F}: [totals] 'whole_sky_mag_limit' must be a finite number; got \"24\""),
    ),
    # -- cosmology ----------------------------------------------------------------------------
    (
        "cosmology-name-and-H0",
        '[cosmology]\nname = "Planck18"\nH0 = 70\nOm0 = 0.3\n',
        InputError,
        exact(
            f"{F}: [cosmology] give either 'name' or 'H0' and 'Om0', not both;"
            ' got name = "Planck18" and H0 = 70.0'
        ),
    ),
    (
        "cosmology-H0-alone",
        "[cosmology]\nH0 = 70\n",
        InputError,
        exact(f"{F}: [cosmology] 'H0' and 'Om0' go together; got H0 = 70.0 and no 'Om0'"),
    ),
    (
        "cosmology-H0-negative",
        "[cosmology]\nH0 = -70\nOm0 = 0.3\n",
        InputError,
        exact(f"{F}: [cosmology] 'H0' must be a number > 0 km/s/Mpc; got -70"),
    ),
    (
        "cosmology-Om0-range",
        "[cosmology]\nH0 = 70\nOm0 = 2.0\n",
        InputError,
        exact(f"{F}: [cosmology] 'Om0' must be a number in [0, 1.5]; got 2.0"),
    ),
    (
        "cosmology-name-choice",
        '[cosmology]\nname = "Plank18"\n',
        InputError,
        r"^survey\.toml: \[cosmology\] 'name' must be one of .*\"Planck18\"; got \"Plank18\";"
        r" did you mean \"Planck18\"\?$",
    ),
    # -- output, engine ----------------------------------------------------------------------
    (
        "output-format-choice",
        '[output]\nformats = ["json", "pdf"]\n',
        InputError,
        exact(
            f'{F}: [output] \'formats[1]\' must be one of "json", "markdown", "html", "png";'
            ' got "pdf"'
        ),
    ),
    (
        "output-dir-empty",
        '[output]\ndir = ""\n',
        InputError,
        exact(f"{F}: [output] 'dir' must be a folder path (a non-empty string); got \"\""),
    ),
    (
        "engine-kind-choice",
        '[engine]\nkind = "dsak"\n',
        InputError,
        exact(
            f'{F}: [engine] \'kind\' must be one of "local", "dask"; got "dsak";'
            ' did you mean "dask"?'
        ),
    ),
    (
        "engine-scheduler-without-dask",
        '[engine]\nscheduler = "tcp://127.0.0.1:8786"\n',
        InputError,
        exact(
            f'{F}: [engine] \'scheduler\' is only used with kind = "dask"; kind is "local";'
            ' got "tcp://127.0.0.1:8786"'
        ),
    ),
    (
        "engine-chunk-rows-float",
        "[engine]\nchunk_rows = 1.5e6\n",
        InputTypeError,
        exact(f"{F}: [engine] 'chunk_rows' must be an integer >= 1; got 1500000.0"),
    ),
    (
        "engine-chunk-rows-zero",
        "[engine]\nchunk_rows = 0\n",
        InputError,
        exact(f"{F}: [engine] 'chunk_rows' must be an integer >= 1; got 0"),
    ),
    # -- populations across the sky (target sky, extinction, sky model, stars) ---------------
    (
        "target-sky-occupancy",
        "[totals]\ntarget_sky = [{occupancy = {order = 5}}]\n",
        InputError,
        exact(f"{F}: [totals] 'target_sky[0]' must be a sky shape, one of 'map', 'moc', 'cap',"
              " 'box', 'polygon', 'circles', 'galactic_latitude_below', 'galactic_latitude_above'"
              "; got 'occupancy' (it describes the catalogue, not a target)"),
    ),
    (
        "target-sky-empty",
        "[totals]\ntarget_sky = []\n",
        InputError,
        r"^survey\.toml: \[totals\] 'target_sky' must be a list of footprint items .*"
        r"\(at least 1\); got \[\]$",
    ),
    (
        "extinction-coefficient-not-positive",
        '[extinction]\nmap = "ebv.fits"\ncoefficient = 0\n',
        InputError,
        exact(f"{F}: [extinction] 'coefficient' must be a number > 0 (A_band / E(B-V)); got 0"),
    ),
    (
        "extinction-coefficient-negative",
        '[extinction]\nmap = "ebv.fits"\ncoefficient = -2.3\n',
        InputError,
        exact(f"{F}: [extinction] 'coefficient' must be a number > 0 (A_band / E(B-V));"
              " got -2.3"),
    ),
    (
        "extinction-band-unknown",
        '[extinction]\nmap = "ebv.fits"\nband = "sdss_rr"\n',
        InputError,
        r"^survey\.toml: \[extinction\] 'band' must be one of \"sdss_u\", .*; got \"sdss_rr\";"
        r" did you mean \"sdss_r\"\?$",
    ),
    (
        "extinction-both-r-and-band",
        '[extinction]\nmap = "ebv.fits"\nband = "sdss_r"\ncoefficient = 2.3\n',
        InputError,
        exact(f"{F}: [extinction] needs exactly one of 'coefficient' (R = A / E(B-V)) and "
              "'band'; got both"),
    ),
    (
        "extinction-no-map",
        "[extinction]\nband = \"sdss_r\"\n",
        InputError,
        exact(f"{F}: [extinction] missing required key 'map'"),
    ),
    (
        "classifier-threshold-out-of-range",
        '[catalog]\npaths = ["c.parquet"]\nra = "ra"\ndec = "dec"\nmag = "m"\n'
        'classifier = "P"\nclassifier_threshold = 1.5\n',
        InputError,
        exact(f"{F}: [catalog] 'classifier_threshold' must be a number in (0, 1]; got 1.5"),
    ),
    (
        "classifier-threshold-without-column",
        '[catalog]\npaths = ["c.parquet"]\nra = "ra"\ndec = "dec"\nmag = "m"\n'
        "classifier_threshold = 0.7\n",
        InputError,
        exact(f"{F}: [catalog] 'classifier_threshold' needs a 'classifier' column; got 0.7"),
    ),
    (
        "sky-model-without-limit",
        "[sky_model]\nnside = 32\n",
        InputError,
        exact(f"{F}: [sky_model] needs a magnitude limit: give 'mag_limit', or [totals] "
              "'whole_sky_mag_limit'; got neither"),
    ),
    (
        "sky-model-unknown-covariate",
        '[sky_model]\nmag_limit = 20\ncovariate_sets = [["log_sin_bb"]]\n',
        InputError,
        exact(f"{F}: [sky_model] 'covariate_sets[0][0]' must be a covariate of the galactic "
              'basis or a map named in \'maps\'; got "log_sin_bb"; did you mean "log_sin_b"?'),
    ),
    (
        "sky-model-ebv-without-extinction",
        '[sky_model]\nmag_limit = 20\ncovariate_sets = [["ebv"]]\n',
        InputError,
        r"^survey\.toml: \[sky_model\] 'covariate_sets\[0\]\[0\]' must be a covariate of the "
        r"galactic basis or a map named in 'maps' \('ebv' needs an \[extinction\] section\);"
        r" got \"ebv\"; expected one of log_sin_b, .*$",
    ),
    (
        "sky-model-nside-not-power-of-two",
        "[sky_model]\nmag_limit = 20\nnside = 48\n",
        InputError,
        exact(f"{F}: [sky_model] 'nside' must be a power of 2 in [1, 1024]; got 48"),
    ),
    (
        "sky-model-repeated-set",
        '[sky_model]\nmag_limit = 20\ncovariate_sets = [["sin_b"], ["sin_b"]]\n',
        InputError,
        exact(f"{F}: [sky_model] 'covariate_sets' must not list the same covariate set twice;"
              ' got [["sin_b"], ["sin_b"]]'),
    ),
    (
        "sky-model-map-named-like-basis",
        '[sky_model]\nmag_limit = 20\nmaps = [{name = "sin_b", path = "m.fits"}]\n',
        InputError,
        exact(f"{F}: [sky_model] 'maps[0].name' must differ from the galactic basis' names and "
              "'ebv' (the [extinction] map); got \"sin_b\""),
    ),
    (
        "contamination-for-stars",
        '[catalog]\npaths = ["c.parquet"]\nra = "ra"\ndec = "dec"\nmag = "m"\n'
        'population = "stars"\n[contamination]\nstar_catalog = ["s.parquet"]\n',
        InputError,
        exact(f'{F}: [contamination] subtracts stars from galaxy counts; got [catalog] '
              'population = "stars"'),
    ),
    (
        "contamination-and-classifier",
        '[catalog]\npaths = ["c.parquet"]\nra = "ra"\ndec = "dec"\nmag = "m"\n'
        'classifier = "P"\n[contamination]\nstar_catalog = ["s.parquet"]\n',
        InputError,
        exact(f"{F}: [contamination] and [catalog] 'classifier' both remove stars; give one of "
              'them; got classifier = "P"'),
    ),
    # -- TOML syntax --------------------------------------------------------------------------
    (
        "toml-syntax-line",
        '[survey]\nname = "Lanternfish"\ndescription = "unterminated\n',
        InputError,
        r"^survey\.toml: TOML syntax error at line 3, column \d+: .+$",
    ),
    (
        "toml-missing-equals",
        "[engine]\nkind\n",
        InputError,
        r"^survey\.toml: TOML syntax error at line 2, column \d+: .+$",
    ),
    (
        "toml-duplicate-key",
        "[variance]\nregions = 10\nregions = 12\n",
        InputError,
        r"^survey\.toml: TOML syntax error at line \d+.*: Cannot overwrite a value$",
    ),
    (
        "toml-end-of-file",
        "[variance]\nregions = ",
        InputError,
        r"^survey\.toml: TOML syntax error at line 2 \(end of file\): .+$",
    ),
]


@pytest.mark.parametrize(
    ("text", "error", "pattern"),
    [pytest.param(text, error, pattern, id=name) for name, text, error, pattern in BAD],
)
def test_bad_input(text: str, error: type[Exception], pattern: str) -> None:
    with pytest.raises(error, match=pattern) as excinfo:
        parse_runfile(text, F)
    message = str(excinfo.value)
    assert "\n" not in message  # one line
    assert message.startswith(f"{F}:")  # names the file
    assert isinstance(excinfo.value, InputError | InputTypeError)


def test_bad_case_ids_are_unique() -> None:
    names = [case[0] for case in BAD]
    assert len(names) == len(set(names))


def test_error_types_subclass_builtins() -> None:
    with pytest.raises(ValueError, match="unknown section"):
        parse_runfile("[nope]\n", F)
    with pytest.raises(TypeError, match="must be a table"):
        parse_runfile("survey = 1\n", F)


def test_messages_name_the_file_as_given(tmp_path: Path) -> None:
    with pytest.raises(InputError, match=r"^runs/deep\.toml: \[variance\] 'regions' "):
        parse_runfile("[variance]\nregions = 1\n", "runs/deep.toml")
    path = tmp_path / "bad.toml"
    path.write_text('[survey]\nname = "x"\nnam = "y"\n', encoding="utf-8")
    with pytest.raises(
        InputError, match=exact(f"{path}: [survey] unknown key 'nam'; did you mean 'name'?")
    ):
        load_runfile(path)


def test_load_errors(tmp_path: Path) -> None:
    missing = tmp_path / "missing.toml"
    with pytest.raises(InputError, match=exact(f"{missing}: run file does not exist")):
        load_runfile(missing)
    with pytest.raises(
        InputError,
        match=exact(f"{tmp_path}: run file must be a file; got a folder or special file"),
    ):
        load_runfile(tmp_path)
    latin1 = tmp_path / "latin1.toml"
    latin1.write_bytes('[survey]\nname = "Año"\n'.encode("latin-1"))
    with pytest.raises(
        InputError,
        match=exact(f"{latin1}: run file must be UTF-8 text; got byte 0xf1 at offset 18"),
    ):
        load_runfile(latin1)
    with pytest.raises(InputTypeError, match=r"^`path` must be a str or path-like; got int$"):
        load_runfile(3)  # type: ignore[arg-type]
    # A UTF-8 byte-order mark (written by some editors) is not an error.
    bom = tmp_path / "bom.toml"
    bom.write_bytes(b"\xef\xbb\xbf" + MINIMAL.encode("utf-8"))
    assert load_runfile(bom).catalog.mag == "mag"
    assert parse_runfile("\ufeff" + MINIMAL, "x.toml").catalog.mag == "mag"
    with pytest.raises(InputTypeError, match=r"^x\.toml: run-file text must be a str; got bytes$"):
        parse_runfile(b"[survey]", "x.toml")  # type: ignore[arg-type]


def test_runfile_is_the_public_result_type(tmp_path: Path) -> None:
    rf = parse_runfile(MINIMAL, tmp_path / "s.toml")
    assert isinstance(rf, RunFile)
    assert isinstance(rf.sections, Table)
    assert isinstance(rf.catalog, Table)
