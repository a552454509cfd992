"""`countscale area` and `countscale horizon` driven through main([...])."""

import json

import healpy as hp
import numpy as np
import pytest

from countscale.cli import main
from countscale.footprint import Footprint

AREA_KEYS = {"area_deg2", "area_sr", "sky_fraction", "area_uncertainty_deg2", "max_order",
             "n_cells"}


def run(argv, capsys):
    code = main(argv)
    out, err = capsys.readouterr()
    return code, out, err


def test_area_of_run_file_footprint(tmp_path, capsys):
    holes = tmp_path / "holes.csv"
    holes.write_text("ra,dec,radius_arcsec\n226.5,10.0,90\n227.2,10.5,30\n")
    runfile = tmp_path / "survey.toml"
    runfile.write_text(
        "[footprint]\nmax_order = 15\n"
        "include = [{box = {ra = [226, 228], dec = [9, 11]}}]\n"
        'exclude = [{circles = "holes.csv"}]\n'
    )
    code, out, err = run(["area", str(runfile), "--json"], capsys)
    assert code == 0, err
    result = json.loads(out)
    assert set(result) == AREA_KEYS
    # (180/pi) * 2 * (sin 11 - sin 9) deg^2 minus two discs pi r^2 (closed forms: the area of
    # an RA/Dec box on the sphere, and of a small cap)
    box = (180 / np.pi) * 2 * (np.sin(np.radians(11)) - np.sin(np.radians(9)))
    discs = np.pi * (90**2 + 30**2) / 3600**2
    assert result["area_deg2"] == pytest.approx(box - discs, rel=1e-7)
    assert result["max_order"] == 15
    code, out, _ = run(["area", str(runfile)], capsys)
    assert code == 0
    assert "area" in out and "deg²" in out and "run file [footprint]" in out


def test_area_of_map_and_moc(tmp_path, capsys):
    nside = 256
    mask = np.zeros(hp.nside2npix(nside))
    pix = hp.query_disc(nside, hp.ang2vec(30, -20, lonlat=True), np.radians(3))
    mask[pix] = 7.0  # hit counts
    hp.write_map(tmp_path / "hits.fits", mask, dtype=np.float64)
    code, _, err = run(["area", str(tmp_path / "hits.fits")], capsys)
    assert code == 2
    assert "hits.fits" in err and "threshold" in err
    assert len(err.strip().splitlines()) == 1
    code, out, _ = run(["area", str(tmp_path / "hits.fits"), "--threshold", "5", "--json"],
                       capsys)
    assert code == 0
    expected = len(pix) * hp.nside2pixarea(nside, degrees=True)
    assert json.loads(out)["area_deg2"] == pytest.approx(expected, rel=1e-12)

    Footprint.cap(30, -20, 3, max_order=12).write_moc(tmp_path / "cap_moc.fits")
    code, out, _ = run(["area", str(tmp_path / "cap_moc.fits"), "--json"], capsys)
    assert code == 0
    assert json.loads(out)["area_deg2"] == pytest.approx(
        2 * np.pi * (1 - np.cos(np.radians(3))) * (180 / np.pi) ** 2, rel=1e-3
    )


def test_area_plot_is_written(tmp_path, capsys):
    png = tmp_path / "fp.png"
    Footprint.box((10, 12), (0, 1), max_order=10).write_moc(tmp_path / "m.fits")
    code, _, err = run(["area", str(tmp_path / "m.fits"), "--plot", str(png)], capsys)
    assert code == 0, err
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


@pytest.mark.parametrize(
    ("content", "name", "message"),
    [
        ("[footprint]\nmax_ordr = 15\ninclude = [{cap = {ra = 1, dec = 2, radius = 1}}]\n",
         "bad.toml", r"unknown key 'max_ordr'; did you mean 'max_order'\?"),
        ("[footprint]\ninclude = [{cap = {ra = 1, dec = 95, radius = 1}}]\n",
         "dec.toml", r"dec"),
        ("[survey]\nname = 'x'\n", "nofp.toml", r"missing required section \[footprint\]"),
        ("not a fits file", "junk.fits", r"junk.fits: not a readable FITS file"),
        ("", "empty.txt", r"FOOTPRINT must be a HEALPix or MOC .fits file or a .toml run file"),
    ],
)
def test_area_input_errors_exit_2(tmp_path, capsys, content, name, message):
    path = tmp_path / name
    path.write_text(content)
    code, out, err = run(["area", str(path)], capsys)
    assert code == 2
    assert out == ""
    assert len(err.strip().splitlines()) == 1
    import re

    assert re.search(message, err), err


def test_missing_file_and_usage_errors(tmp_path, capsys):
    code, _, err = run(["area", str(tmp_path / "nope.fits")], capsys)
    assert code == 2 and "nope.fits: file not found" in err
    code, _, err = run(["area"], capsys)
    assert code == 2 and "FOOTPRINT" in err
    code, _, _ = run(["--help"], capsys)
    assert code == 0


def test_horizon_json(capsys):
    code, out, _ = run(["horizon", "--json"], capsys)
    assert code == 0
    result = json.loads(out)
    # Planck 2018: comoving particle horizon 14.17 Gpc = 46.2 Gly (the integral of c dz / H(z)
    # for astropy's Planck18, computed with mpmath.quad)
    assert result["radius_mpc"] == pytest.approx(14170, rel=3e-3)
    assert result["radius_gly"] == pytest.approx(46.2, rel=3e-3)
    # Age 13.787 Gyr (Planck Collaboration 2020, A&A 641, A6, Table 2)
    assert result["age_gyr"] == pytest.approx(13.787, abs=0.01)
