"""Lens-model files that say what they hold (LENSMAP), and magnification overlays."""

import numpy as np
import pytest
from astropy.io import fits

import lensview as lv
from lensview.errors import LensviewInputError, MissingMassWarning
from lensview.io.mapfiles import (MAP_KIND_KEYWORD, magnification_overlay_on, map_kind,
                               read_magnification_map)

from closed_form import make_wcs

Z_LENS = 0.4
N = 96


@pytest.fixture(scope="module")
def maps(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("maps")
    wcs = make_wcs(N, N, scale_arcsec=0.06, rotation_deg=12.0)
    y, x = np.mgrid[0:N, 0:N].astype(float)
    r2 = (x - 47.3) ** 2 + (y - 48.6) ** 2
    kappa = 0.8 * np.exp(-r2 / (2 * 9.0**2))
    psi = 3.0 * np.sqrt(r2 + 25.0) * 0.06**2  # a cored isothermal potential, arcsec^2
    header = wcs.to_header()
    written = {}
    for name, data, extra in (
            ("kappa_tagged", kappa, {MAP_KIND_KEYWORD: "CONVERGENCE", "Z_NORM": 2.5}),
            ("kappa_bare", kappa, {}),
            ("psi_arcsec", psi, {MAP_KIND_KEYWORD: "potential", "BUNIT": "arcsec2"}),
            ("psi_deg", psi / 3600.0**2, {MAP_KIND_KEYWORD: "POTENTIAL", "BUNIT": "deg2"}),
            ("psi_flux", psi, {MAP_KIND_KEYWORD: "POTENTIAL", "BUNIT": "Jy"}),
            ("mu", 1.0 / (1.0 - kappa) ** 2, {MAP_KIND_KEYWORD: "MAGNIFICATION"}),
            ("odd", kappa, {MAP_KIND_KEYWORD: "SHEAR-ISH"})):
        h = header.copy()
        h.update(extra)
        path = tmp / f"{name}.fits"
        fits.writeto(path, data.astype(np.float32), h)
        written[name] = path
    return written, wcs, kappa.astype(np.float32), psi.astype(np.float32)


def test_convergence_file_is_read_as_the_keyword_says(maps):
    files, wcs, kappa, _ = maps
    assert map_kind(files["kappa_tagged"]) == "convergence"
    with pytest.warns(MissingMassWarning):
        field = lv.load_model(files["kappa_tagged"], z_lens=Z_LENS)
    with pytest.warns(MissingMassWarning):
        direct = lv.DeflectionField.from_convergence(kappa, wcs, z_lens=Z_LENS, z_norm=2.5)
    assert field.z_norm == 2.5 and field.name == "kappa_tagged"
    np.testing.assert_allclose(field.node_deflection(slice(None), slice(None))[0],
                               direct.node_deflection(slice(None), slice(None))[0], atol=1e-5)


def test_the_user_overrides_the_keyword(maps):
    files, wcs, kappa, _ = maps
    # No keyword: a single map is not a deflection pair ...
    with pytest.raises(LensviewInputError, match="single 2-D map"):
        lv.load_model(files["kappa_bare"], z_lens=Z_LENS, units="arcsec")
    # ... unless the user says what it is.
    with pytest.warns(MissingMassWarning):
        field = lv.load_model(files["kappa_bare"], z_lens=Z_LENS, kind="convergence",
                              external_kappa=0.05)
    assert field.z_norm is None
    terms = field.local_terms([5.0], [90.0])
    # Far from the Gaussian its own convergence is ~0: what is left is the added sheet.
    assert abs(terms.convergence(1.0)[0] - 0.05) < 1e-3
    with pytest.raises(LensviewInputError, match="one file"):
        lv.load_model(files["kappa_bare"], files["kappa_bare"], z_lens=Z_LENS, kind="potential")
    with pytest.raises(LensviewInputError, match="convergence maps only"):
        lv.load_model(files["psi_arcsec"], z_lens=Z_LENS, fill_nan=0.0)


def test_potential_files_keep_the_potential_in_arcsec2(maps):
    files, wcs, _, psi = maps
    arcsec = lv.load_model(files["psi_arcsec"], z_lens=Z_LENS)
    degrees = lv.load_model(files["psi_deg"], z_lens=Z_LENS)
    np.testing.assert_allclose(arcsec.potential, psi, rtol=1e-6)
    np.testing.assert_allclose(degrees.potential, psi, rtol=1e-5)  # deg^2 -> arcsec^2 (astropy.units)
    with pytest.raises(LensviewInputError, match="BUNIT = 'Jy'.*arcsec\\^2"):
        lv.load_model(files["psi_flux"], z_lens=Z_LENS)


def test_magnification_maps_are_overlays_only(maps):
    files, wcs, kappa, _ = maps
    with pytest.raises(LensviewInputError, match="not enough to place critical curves"):
        lv.load_model(files["mu"], z_lens=Z_LENS)
    with pytest.raises(LensviewInputError, match="SHEAR-ISH"):
        lv.load_model(files["odd"], z_lens=Z_LENS)
    overlay = read_magnification_map(files["mu"])
    on_itself = magnification_overlay_on(overlay, wcs, (N, N))
    np.testing.assert_allclose(on_itself[5:-5, 5:-5], np.abs(overlay.data)[5:-5, 5:-5], rtol=1e-5)
    with pytest.raises(LensviewInputError, match="not MAGNIFICATION"):
        read_magnification_map(files["kappa_tagged"])
