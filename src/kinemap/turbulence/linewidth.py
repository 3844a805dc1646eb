"""Line width against the size of the region: apertures of growing size, and the sonic scale.

The spectrum averaged over an aperture is the intensity-weighted sum of the pixels'
spectra, so its dispersion follows from the per-pixel maps without touching the cube
(the law of total variance, exact for moments and for Gaussian components):

    sigma_L^2 = <sigma_i^2>_I + <(v_i - <v>_I)^2>_I

with <.>_I the intensity-weighted mean over the pixels of the aperture.  The second term
alone is the dispersion of the centroid velocities within the aperture.  With per-pixel
non-thermal dispersions (the width budget) the same sum with sigma_nt,i gives the
non-thermal dispersion of the aperture: centroid motions are non-thermal by nature.

Apertures are square boxes tiling the map (centred, non-overlapping), from one beam to
half the map's smaller side so that every size has at least four; a box counts when at
least half of its pixels hold a measurement.  Each size's value is the mean over its
boxes and its error the standard error of that mean.  Larson (1981, MNRAS 194, 809)
found sigma ~ L^0.38 across molecular clouds.
"""
from __future__ import annotations

import math

import numpy as np

__all__ = ["aperture_sizes", "size_linewidth_arrays", "sonic_scale"]

# arcsec per radian: a length L at distance D spans L/D radians (small angles), so
# size_pc = size_arcsec / ARCSEC_PER_RADIAN * D_pc
ARCSEC_PER_RADIAN = 180.0 * 3600.0 / math.pi


def aperture_sizes(shape, *, min_pixels: float = 1.0, nsizes: int = 10) -> np.ndarray:
    """Box sides (whole pixels) on a logarithmic grid from ``min_pixels`` to half the map's
    smaller side, without repeats."""
    hi = max(min(shape) // 2, 1)
    lo = min(max(int(math.ceil(min_pixels - 1e-9)), 1), hi)
    return np.unique(np.rint(np.geomspace(lo, hi, int(nsizes))).astype(int))


def _box_sums(arr, b):
    """Sums of ``arr`` over b x b boxes tiling the (centred) map."""
    ny, nx = arr.shape
    my, mx = ny // b, nx // b
    oy, ox = (ny - my * b) // 2, (nx - mx * b) // 2
    a = arr[oy:oy + my * b, ox:ox + mx * b]
    return a.reshape(my, b, mx, b).sum(axis=(1, 3))


def size_linewidth_arrays(intensity, velocity, dispersion, *, nonthermal=None,
                          pixel_scale: float, beam: float | None = None, nsizes: int = 10):
    """Dispersion of aperture-averaged spectra against aperture size.

    Parameters
    ----------
    intensity, velocity, dispersion : ndarray (ny, nx)
        Integrated intensity (weights), centroid velocity and dispersion (km/s) per pixel.
    nonthermal : ndarray (ny, nx), optional
        Per-pixel non-thermal dispersion (km/s), for ``sigma_nt``.
    pixel_scale : float
        arcsec per pixel.
    beam : float, optional
        Beam FWHM (arcsec): the smallest aperture (default one pixel).

    Returns
    -------
    dict of ndarray
        ``size`` (box side, arcsec), ``sigma``, ``sigma_err``, ``sigma_nt``,
        ``sigma_nt_err``, ``sigma_centroid`` (km/s), ``napertures``.
    """
    inten = np.asarray(intensity, float)
    v, s = np.asarray(velocity, float), np.asarray(dispersion, float)
    ok = np.isfinite(inten) & (inten > 0) & np.isfinite(v) & np.isfinite(s)
    nt = None
    if nonthermal is not None:
        nt = np.asarray(nonthermal, float)
        ok &= np.isfinite(nt)
    sizes = aperture_sizes(v.shape, min_pixels=(beam or pixel_scale) / pixel_scale, nsizes=nsizes)
    rows = {k: [] for k in ("size", "sigma", "sigma_err", "sigma_nt", "sigma_nt_err",
                            "sigma_centroid", "napertures")}
    w = np.where(ok, inten, 0.0)
    vv = np.where(ok, v, 0.0)
    for b in sizes:
        sw, n = _box_sums(w, b), _box_sums(ok.astype(float), b)
        with np.errstate(invalid="ignore", divide="ignore"):
            mean_v = _box_sums(w * vv, b) / sw
            var_v = np.clip(_box_sums(w * vv ** 2, b) / sw - mean_v ** 2, 0, None)
            sig2 = _box_sums(w * np.where(ok, s, 0) ** 2, b) / sw + var_v
            nt2 = (_box_sums(w * np.where(ok, nt, 0) ** 2, b) / sw + var_v) if nt is not None \
                else np.full_like(sig2, np.nan)
        use = (n >= 0.5 * b * b) & (sw > 0)
        k = int(use.sum())
        rows["size"].append(b * pixel_scale)
        rows["napertures"].append(k)
        for key, val in (("sigma", np.sqrt(sig2)), ("sigma_nt", np.sqrt(nt2)),
                         ("sigma_centroid", np.sqrt(var_v))):
            x = val[use]
            rows[key].append(float(np.mean(x)) if k else np.nan)
            if key != "sigma_centroid":
                rows[f"{key}_err"].append(float(np.std(x, ddof=1) / math.sqrt(k)) if k > 1
                                          else np.nan)
    return {k: np.asarray(val) for k, val in rows.items()}


def sonic_scale(fit: dict, sound_speed: float, sound_speed_err: float = 0.0,
                *, sizes=None) -> dict:
    """Size at which a power law sigma_nt = A L^gamma reaches the sound speed.

    Parameters
    ----------
    fit : dict
        :func:`kinemap.turbulence.structure.fit_power_law` of sigma_nt (km/s) against L.
    sound_speed, sound_speed_err : float
        c_s and its error (km/s).
    sizes : ndarray, optional
        The measured sizes: the scale counts as reached when it lies within them.

    Returns
    -------
    dict
        ``scale`` and ``scale_err`` (units of L; error from the fit covariance and the
        sound speed's error, first order in log L), ``reached`` (inside the measured sizes).
    """
    a, g, cov = fit["amplitude"], fit["slope"], fit["log_cov"]
    if not (np.isfinite(a) and np.isfinite(g) and g > 0 and sound_speed > 0):
        return {"scale": None, "scale_err": None, "reached": False}
    la, lc = math.log10(a), math.log10(sound_speed)
    log_l = (lc - la) / g
    # gradient of log10 L with respect to (log10 A, gamma) and log10 c_s
    d = np.array([-1.0 / g, -(lc - la) / g ** 2])
    var = float(d @ cov @ d) + (sound_speed_err / (sound_speed * math.log(10)) / g) ** 2
    scale = 10 ** log_l
    reached = sizes is not None and len(sizes) and (np.nanmin(sizes) <= scale <= np.nanmax(sizes))
    return {"scale": float(scale), "scale_err": float(scale * math.log(10) * math.sqrt(max(var, 0))),
            "reached": bool(reached)}
