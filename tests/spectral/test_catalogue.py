"""Line catalogue, air/vacuum conversion, CTYPE media and the spectral-range check."""
import textwrap

import astropy.units as u
import numpy as np
import pytest

from kinemap.errors import KinemapError
from kinemap.spectral.axes import SPECTRAL_CTYPES, axis_kind
from kinemap.widths import (
    Line,
    air_to_vacuum,
    check_line_in_range,
    get_line,
    load_catalogue,
    medium_from_ctype,
    vacuum_to_air,
)

# Air wavelengths in Angstrom: NIST ASD (from memory), as listed in shared/DESIGN.md.
NIST_AIR = {
    "Halpha": 6562.80,
    "Hbeta": 4861.33,
    "NII_6548": 6548.05,
    "NII_6583": 6583.45,
    "OIII_5007": 5006.84,
    "SII_6716": 6716.44,
    "SII_6731": 6730.82,
}
# Vacuum wavelengths in Angstrom: NIST ASD / SDSS line list (from memory).
NIST_VACUUM = {
    "Halpha": 6564.61,
    "Hbeta": 4862.68,
    "NII_6548": 6549.86,
    "NII_6583": 6585.27,
    "OIII_5007": 5008.24,
    "SII_6716": 6718.29,
    "SII_6731": 6732.67,
}
# Standard atomic weights (IUPAC; from memory) and rounded isotopologue masses.
MASSES = {
    "Halpha": 1.008, "Hbeta": 1.008, "HI_21cm": 1.008,
    "NII_6548": 14.007, "NII_6583": 14.007, "OIII_5007": 15.999,
    "SII_6716": 32.06, "SII_6731": 32.06,
    "CO_1-0": 28.0, "13CO_1-0": 29.0, "C18O_1-0": 30.0,
}


def test_catalogue_has_required_lines_with_sources():
    cat = load_catalogue()
    assert set(MASSES) <= set(cat)
    for name, line in cat.items():
        assert isinstance(line, Line)
        assert line.name == name
        assert "from memory" in line.source  # every built-in value says where it comes from


@pytest.mark.parametrize("name", sorted(NIST_AIR))
def test_air_wavelengths_match_nist(name):
    # NIST ASD air wavelengths (from memory), to 0.01 Angstrom
    got = get_line(name).rest_value("air")
    assert got.unit == u.AA
    assert abs(got.value - NIST_AIR[name]) <= 0.01


@pytest.mark.parametrize("name", sorted(NIST_VACUUM))
def test_vacuum_wavelengths_match_nist(name):
    # NIST ASD vacuum wavelengths (from memory), to 0.01 Angstrom
    assert abs(get_line(name).rest_value("vacuum").to_value(u.AA) - NIST_VACUUM[name]) <= 0.01


@pytest.mark.parametrize("name", sorted(NIST_AIR))
def test_air_to_vacuum_reproduces_nist_vacuum(name):
    # Edlen (1966) standard-air formula applied to the NIST air value must give the NIST
    # vacuum value (both from memory) to 0.01 Angstrom.
    vac = air_to_vacuum(NIST_AIR[name] * u.AA)
    assert abs(vac.to_value(u.AA) - NIST_VACUUM[name]) <= 0.01
    air = vacuum_to_air(NIST_VACUUM[name] * u.AA)
    assert abs(air.to_value(u.AA) - NIST_AIR[name]) <= 0.01


def test_halpha_air_to_vacuum_reference_value():
    # H-alpha: 6562.80 A in air is 6564.61 A in vacuum (NIST ASD; from memory)
    assert air_to_vacuum(6562.80 * u.AA).to_value(u.AA) == pytest.approx(6564.61, abs=0.01)
    # units other than Angstrom go through astropy
    assert air_to_vacuum(656.280 * u.nm).to_value(u.nm) == pytest.approx(656.461, abs=0.001)


def test_edlen_agrees_with_iau_standard_formula():
    # IAU standard conversion in the polynomial form of Morton (1991, ApJS 77, 119), used
    # for the SDSS spectra (from memory): air = vac / (1 + 2.735182e-4 + 131.4182/vac^2
    # + 2.76249e8/vac^4), vac in Angstrom.  Independent of our Edlen (1966) form; they
    # agree to better than 0.01 A across the optical.
    vac = np.linspace(3000.0, 10000.0, 300)
    morton = vac / (1 + 2.735182e-4 + 131.4182 / vac**2 + 2.76249e8 / vac**4)
    ours = vacuum_to_air(vac * u.AA).to_value(u.AA)
    np.testing.assert_allclose(ours, morton, atol=0.01, rtol=0)


def test_air_vacuum_round_trip_and_uv_cutoff():
    vac = np.array([2500.0, 4000.0, 6564.61, 9000.0, 21000.0]) * u.AA
    back = air_to_vacuum(vacuum_to_air(vac))
    np.testing.assert_allclose(back.to_value(u.AA), vac.value, rtol=0, atol=1e-8)
    # Below 2000 A air and vacuum wavelengths coincide (NIST convention; common practice)
    assert vacuum_to_air(1215.67 * u.AA).to_value(u.AA) == 1215.67
    nan_in = vacuum_to_air([np.nan, 5000.0] * u.AA)
    assert np.isnan(nan_in[0]) and np.isfinite(nan_in[1])


def test_radio_rest_frequencies():
    # HI: Hellwig et al. 1970 (from memory); CO isotopologues: CDMS catalogue (from memory)
    assert get_line("HI_21cm").rest_value("frequency").to_value(u.MHz) == pytest.approx(
        1420.405751768, rel=1e-13, abs=0)
    assert get_line("CO_1-0").rest_value("frequency").to_value(u.GHz) == pytest.approx(115.2712018, rel=1e-13)
    assert get_line("13CO_1-0").rest_value("frequency").to_value(u.GHz) == pytest.approx(110.2013543, rel=1e-13)
    assert get_line("C18O_1-0").rest_value("frequency").to_value(u.GHz) == pytest.approx(109.7821734, rel=1e-13)


def test_rest_value_in_other_media_matches_astropy_spectral_equivalency():
    # astropy's u.spectral() equivalency is the reference library for lambda = c / nu
    ha = get_line("Halpha")
    assert ha.rest_value("frequency").to_value(u.GHz) == pytest.approx(
        (6564.61 * u.AA).to_value(u.GHz, equivalencies=u.spectral()), rel=1e-12)
    hi = get_line("HI_21cm")
    assert hi.rest_value("vacuum").to_value(u.cm) == pytest.approx(
        (1420.405751768 * u.MHz).to_value(u.cm, equivalencies=u.spectral()), rel=1e-12)
    assert hi.rest_value("vacuum").to_value(u.cm) == pytest.approx(21.106, abs=0.001)  # "21 cm" (common practice)


@pytest.mark.parametrize("name", sorted(MASSES))
def test_masses(name):
    # Standard atomic weights (IUPAC; from memory); CO isotopologue masses rounded
    line = get_line(name)
    assert line.mass.unit == u.u
    assert line.mass.to_value(u.u) == pytest.approx(MASSES[name], abs=1e-9)


def test_halpha_fine_structure_in_catalogue():
    # Garcia-Diaz et al. 2008, RMxAA 44, 181 (from memory): 10.233 km^2/s^2
    ha = get_line("Halpha")
    assert ha.fine_structure_variance.to_value(u.km**2 / u.s**2) == pytest.approx(10.233)
    assert get_line("NII_6583").fine_structure_variance_km2_s2 == 0.0


def test_line_is_frozen():
    with pytest.raises(AttributeError):
        get_line("Halpha").mass_amu = 2.0


@pytest.mark.parametrize(
    "ctype, medium",
    [("AWAV", "air"), ("WAVE", "vacuum"), ("FREQ", "frequency"), ("VRAD", "frequency"),
     ("VOPT", "vacuum"), ("AWAV-LOG", "air"), ("wave-f2w", "vacuum"), ("VELO-LSR", "frequency"),
     ("FELO-HEL", "vacuum")],
)
def test_medium_from_ctype(ctype, medium):
    # FITS spectral types (Greisen et al. 2006, A&A 446, 747)
    assert medium_from_ctype(ctype) == medium


@pytest.mark.parametrize("ctype", sorted(SPECTRAL_CTYPES))
def test_medium_from_ctype_agrees_with_axis_kind(ctype):
    # The reader (axis_kind) and the line look-up (medium_from_ctype) read one CTYPE table.
    # A wavelength axis's own medium is the medium of its rest values; a velocity axis has
    # no medium of its own, and its rest values are in the medium its definition is linear
    # in (Greisen et al. 2006): vacuum wavelength for optical velocity and redshift,
    # frequency for radio and relativistic velocity.
    for spelled in (ctype, ctype.lower() + "-F2W"):
        kind = axis_kind(spelled)
        assert medium_from_ctype(spelled) == kind.rest_medium
        if kind.physical == "wavelength":
            assert medium_from_ctype(spelled) == kind.medium
        elif kind.physical == "velocity":
            assert kind.medium is None
            expected = "vacuum" if kind.convention == "optical" else "frequency"
            assert medium_from_ctype(spelled) == expected
        else:
            assert kind.medium is None and medium_from_ctype(spelled) == "frequency"


def test_vopt_has_no_medium_of_its_own_but_vacuum_rest_values():
    assert axis_kind("VOPT").medium is None
    assert medium_from_ctype("VOPT") == "vacuum"


def test_medium_from_ctype_rejects_non_spectral():
    with pytest.raises(KinemapError, match=r"'ctype' 'RA---TAN' is not a spectral axis type"):
        medium_from_ctype("RA---TAN")


def test_unknown_line_lists_known_names():
    with pytest.raises(KinemapError, match=r"unknown line 'Hgamma'; known lines are Halpha, Hbeta, .*13CO_1-0"):
        get_line("Hgamma")


def test_get_line_checks_medium():
    assert get_line("Halpha", medium="air").name == "Halpha"
    with pytest.raises(KinemapError, match=r"line 'HI_21cm' is a radio line without an air wavelength"):
        get_line("HI_21cm", medium="air")
    with pytest.raises(KinemapError, match=r"'medium' must be one of \['air', 'vacuum', 'frequency'\], got 'water'"):
        get_line("Halpha", medium="water")


# ---------------------------------------------------------------- user extension

def _write(tmp_path, text, name="extra.toml"):
    p = tmp_path / name
    p.write_text(textwrap.dedent(text), encoding="utf-8")
    return p


def test_user_catalogue_extends_builtin(tmp_path):
    p = _write(tmp_path, """
        [lines.Hgamma]
        vacuum_wavelength_angstrom = 4341.69
        mass_amu = 1.008
        source = "test entry"

        [lines."NH3_11"]
        frequency_ghz = 23.6944955
        mass_amu = 17.03
        source = "test entry"
        """)
    cat = load_catalogue(p)
    assert "Halpha" in cat and "Hgamma" in cat and "NH3_11" in cat
    hg = get_line("Hgamma", catalogue=cat)
    # air value derived with the Edlen formula: about 1.22 A shorter at 4341 A (NIST Hgamma
    # air 4340.47 A; from memory)
    assert hg.rest_value("air").to_value(u.AA) == pytest.approx(4340.47, abs=0.01)
    assert "Edlen 1966" in hg.source
    assert get_line("NH3_11", catalogue=cat).rest_value("frequency").to_value(u.GHz) == 23.6944955
    # the built-in catalogue itself is unchanged
    assert "Hgamma" not in load_catalogue()


@pytest.mark.parametrize(
    "text, match",
    [
        ("[lines.X]\nmass_amu = 1.0\nsource = 'a'\nair_wavelength_angstrom = ", r"is not valid TOML"),
        ("[lines.X]\nsource = 'a'\nair_wavelength_angstrom = 5000.0\n", r"line 'X' in .* lacks 'mass_amu'; add mass_amu ="),
        ("[lines.X]\nmass_amu = 1.0\nair_wavelength_angstrom = 5000.0\n", r"line 'X' in .* lacks 'source'"),
        ("[lines.X]\nmass_amu = 1.0\nsource = 'a'\n", r"line 'X' in .* lacks a rest value"),
        ("[lines.X]\nmass_amu = 1.0\nsource = 'a'\nwavelength = 5000.0\n", r"unknown field\(s\) \['wavelength'\]"),
        ("[lines.X]\nmass_amu = -1.0\nsource = 'a'\nfrequency_ghz = 1.0\n", r"'mass_amu' must be positive"),
        ("[lines.X]\nmass_amu = 'heavy'\nsource = 'a'\nfrequency_ghz = 1.0\n", r"'mass_amu' must be a finite number"),
        ("[lines.X]\nmass_amu = 1.0\nsource = 'a'\nfrequency_ghz = 1.0\nair_wavelength_angstrom = 5000.0\n",
         r"gives both a wavelength and a frequency"),
        ("[lines.Halpha]\nmass_amu = 1.0\nsource = 'a'\nfrequency_ghz = 1.0\n", r"line 'Halpha' .* already in the built-in catalogue"),
        ("title = 'x'\n", r"has no \[lines.<NAME>\] tables"),
    ],
)
def test_user_catalogue_errors(tmp_path, text, match):
    p = _write(tmp_path, text)
    with pytest.raises(KinemapError, match=match):
        load_catalogue(p)


def test_user_catalogue_missing_file(tmp_path):
    with pytest.raises(KinemapError, match=r"the line catalogue .*nope.toml' does not exist"):
        load_catalogue(tmp_path / "nope.toml")


# ---------------------------------------------------------------- spectral range check

def test_line_in_frequency_cube():
    freqs = np.linspace(1419.0, 1421.5, 64) * u.MHz
    pos = check_line_in_range("HI_21cm", freqs)
    assert pos.unit == u.MHz
    assert pos.value == pytest.approx(1420.405751768, rel=1e-12)
    # a galaxy receding at 1000 km/s: nu = nu0 sqrt((1-b)/(1+b)) (relativistic Doppler,
    # compared with astropy's doppler_relativistic equivalency, the reference library)
    expect = (1000 * u.km / u.s).to(u.MHz, equivalencies=u.doppler_relativistic(1420.405751768 * u.MHz))
    freqs2 = np.linspace(1410.0, 1418.0, 64) * u.MHz
    pos2 = check_line_in_range("HI_21cm", freqs2, velocity=1000 * u.km / u.s)
    assert pos2.value == pytest.approx(expect.value, rel=1e-12)
    with pytest.raises(KinemapError, match=r"line 'HI_21cm' at 1420.40575\d* MHz lies outside the cube's spectral range 1410 to 1418 MHz"):
        check_line_in_range("HI_21cm", freqs2)


def test_line_in_wavelength_cube_air_and_vacuum():
    air_axis = np.linspace(6540.0, 6600.0, 200) * u.AA
    assert check_line_in_range("Halpha", air_axis, medium="air").value == pytest.approx(6562.80)
    assert check_line_in_range("Halpha", air_axis, medium="vacuum").value == pytest.approx(6564.61)
    # Doppler shift dLambda/Lambda = v/c: 656.3 nm at -30 km/s shifts by -0.0657 nm (common practice)
    shifted = check_line_in_range("Halpha", air_axis, medium="air", velocity=-30 * u.km / u.s)
    assert (shifted.value - 6562.80) == pytest.approx(-0.657, abs=0.001)
    narrow = np.linspace(6563.5, 6600.0, 50) * u.AA
    with pytest.raises(KinemapError, match=r"line 'Halpha' at 6562.8\d* Angstrom \(air\) lies outside the cube's spectral range 6563.5 to 6600 Angstrom"):
        check_line_in_range("Halpha", narrow, medium="air")
    # in vacuum the same line is inside: the medium matters by 1.8 A
    check_line_in_range("Halpha", narrow, medium="vacuum")
    with pytest.raises(KinemapError, match=r"'medium' must be 'air' or 'vacuum' for a wavelength axis, got None"):
        check_line_in_range("Halpha", air_axis)


def test_line_in_velocity_cube():
    vel = np.linspace(-50.0, 50.0, 101) * u.km / u.s
    assert check_line_in_range("13CO_1-0", vel).value == 0.0
    # C18O in a cube whose velocities refer to 13CO (radio convention): about +1140 km/s
    # (astropy doppler_radio equivalency is the reference)
    with pytest.raises(KinemapError, match=r"line 'C18O_1-0' at 1140\.\d* km / s lies outside"):
        check_line_in_range("C18O_1-0", vel, rest_value=110.2013543 * u.GHz, convention="radio")
    with pytest.raises(KinemapError, match=r"'convention' must be one of"):
        check_line_in_range("C18O_1-0", vel, rest_value=110.2013543 * u.GHz)


def test_check_line_in_range_bad_values():
    with pytest.raises(KinemapError, match=r"'spectral_values' must be a Quantity"):
        check_line_in_range("Halpha", np.linspace(6500, 6600, 10))
    with pytest.raises(KinemapError, match=r"'spectral_values' must be frequencies, wavelengths or velocities, got unit K"):
        check_line_in_range("Halpha", np.linspace(1, 2, 10) * u.K)
