"""--unit K|Jy/beam: brightness conversion against astropy's brightness_temperature
equivalency (reference library), for a frequency axis and a velocity axis."""
import warnings

import astropy.units as u
import numpy as np
import pytest
from astropy.io import fits

from conftest import make_header, run_cli, write_cube
from kinemap.errors import KinemapError
from kinemap.io.reader import read_cube

BEAM = {"BMAJ": 30 / 3600, "BMIN": 20 / 3600, "BPA": 10.0}
# 13CO(1-0) rest frequency 110.2013543 GHz (CDMS catalogue; from memory)
REST_13CO = 110.2013543e9


def _read(path, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return read_cube(path, **kw)


def _beam_area():
    # Gaussian beam solid angle pi / (4 ln 2) * major * minor (common practice)
    return (np.pi / (4 * np.log(2)) * (30 * u.arcsec) * (20 * u.arcsec)).to(u.sr)


def _data(nchan=16, ny=5, nx=4):
    return np.random.default_rng(7).uniform(0.5, 2.0, (nchan, ny, nx))


def test_frequency_axis_jy_to_k_equals_astropy(tmp_path):
    data = _data()
    h = make_header("FREQ", nchan=16, ny=5, nx=4, crval=110.19e9, cdelt=0.5e6,
                    extra={**BEAM, "BUNIT": "Jy/beam", "RESTFRQ": REST_13CO})
    path = write_cube(tmp_path / "c.fits", data, h)
    cube = _read(path, unit="K")
    assert cube.meta.bunit == u.K
    freq = (110.19e9 + 0.5e6 * np.arange(16)) * u.Hz  # CRPIX3 = 1: channel i at CRVAL + i CDELT
    # Reference library: astropy's brightness_temperature equivalency, channel by channel.
    expected = (data.astype(np.float32) * u.Jy / u.beam).to(
        u.K, equivalencies=u.brightness_temperature(freq[:, None, None], beam_area=_beam_area()))
    np.testing.assert_allclose(np.asarray(cube.data), expected.value, rtol=2e-6)
    # slices of the lazily scaled data agree with the whole
    np.testing.assert_allclose(cube.data[3:7, 1:3, :], expected.value[3:7, 1:3, :], rtol=2e-6)
    # and back to Jy/beam gives the file's values
    back = _read(write_cube(tmp_path / "k.fits", np.asarray(cube.data),
                            make_header("FREQ", nchan=16, ny=5, nx=4, crval=110.19e9,
                                        cdelt=0.5e6, extra={**BEAM, "BUNIT": "K",
                                                            "RESTFRQ": REST_13CO})),
                 unit="Jy/beam")
    np.testing.assert_allclose(np.asarray(back.data), data, rtol=1e-5)


def test_velocity_axis_with_rest_frequency_equals_astropy(tmp_path):
    data = _data()
    h = make_header("VRAD", nchan=16, ny=5, nx=4, crval=-8e3, cdelt=1e3, cunit="m/s",
                    extra={**BEAM, "BUNIT": "K", "RESTFRQ": REST_13CO})
    path = write_cube(tmp_path / "v.fits", data, h)
    cube = _read(path, unit="Jy/beam")
    v = (-8.0 + np.arange(16)) * u.km / u.s
    # Reference library: astropy's doppler_radio equivalency gives the channel frequencies,
    # astropy's brightness_temperature equivalency the conversion.
    freq = v.to(u.Hz, equivalencies=u.doppler_radio(REST_13CO * u.Hz))
    expected = (data.astype(np.float32) * u.K).to(
        u.Jy / u.beam,
        equivalencies=u.brightness_temperature(freq[:, None, None], beam_area=_beam_area()))
    np.testing.assert_allclose(np.asarray(cube.data), expected.value, rtol=2e-6)
    assert cube.meta.bunit == u.Jy / u.beam


@pytest.mark.parametrize("extra, kw, message", [
    ({"BUNIT": "Jy/beam"}, {}, "needs the cube's beam"),
    ({**BEAM, "BUNIT": "erg/(s cm2)"}, {}, "converts between K and Jy/beam"),
    ({**BEAM, "BUNIT": "Jy/beam"}, {"vel": True}, "needs a rest frequency"),
    ({**BEAM, "BUNIT": "K"}, {"unit": "mK"}, "must be one of K, Jy/beam"),
])
def test_refusals_name_the_fix(tmp_path, extra, kw, message):
    if kw.get("vel"):
        h = make_header("VRAD", nchan=8, ny=4, nx=4, crval=-4e3, cdelt=1e3, cunit="m/s",
                        extra=extra)
    else:
        h = make_header("FREQ", nchan=8, ny=4, nx=4, extra={**extra, "RESTFRQ": REST_13CO})
    path = write_cube(tmp_path / "c.fits", _data(8, 4, 4), h)
    with pytest.raises(KinemapError, match=message):
        _read(path, unit=kw.get("unit", "K"))


def test_cli_maps_in_kelvin_match_spectral_cube(tmp_path):
    data = _data(nchan=24, ny=6, nx=5)
    h = make_header("FREQ", nchan=24, ny=6, nx=5, crval=110.19e9, cdelt=0.5e6,
                    extra={**BEAM, "BUNIT": "Jy/beam", "RESTFRQ": REST_13CO})
    path = write_cube(tmp_path / "c.fits", data, h)
    out = tmp_path / "out"
    code, _, err = run_cli("maps", path, "--unit", "K", "--no-mask", "--continuum", "none",
                           "--out", str(out), "--no-plots", "--no-progress")
    assert code == 0, err
    m0 = fits.getdata(out / "moment0.fits")
    assert u.Unit(fits.getheader(out / "moment0.fits")["BUNIT"]) == u.K * u.km / u.s
    assert u.Unit(fits.getheader(out / "peak.fits")["BUNIT"]) == u.K
    # Reference library: spectral-cube's own Jy/beam -> K conversion (to(u.K)) and moment0.
    from spectral_cube import SpectralCube

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        sc = SpectralCube.read(path).to(u.K).with_spectral_unit(
            u.km / u.s, velocity_convention="radio", rest_value=REST_13CO * u.Hz)
        ref = sc.moment0().to_value(u.K * u.km / u.s)
    np.testing.assert_allclose(m0, ref, rtol=1e-5)
    code, _, err = run_cli("maps", write_cube(tmp_path / "nobeam.fits", data,
                                              make_header("FREQ", nchan=24, ny=6, nx=5,
                                                          extra={"BUNIT": "Jy/beam",
                                                                 "RESTFRQ": REST_13CO})),
                           "--unit", "K", "--out", str(tmp_path / "o2"), "--no-progress")
    assert code == 2 and "give it with --beam" in err.strip().splitlines()[-1]
    assert not (tmp_path / "o2").exists()
