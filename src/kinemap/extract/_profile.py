"""What is measured on one spectrum: a Gaussian fit and the moments of its line."""
from __future__ import annotations

import math
import warnings

import numpy as np

__all__ = ["fit_gaussian", "line_moments"]

_NAN = float("nan")


def _empty_fit(reason: str) -> dict:
    keys = ("amplitude", "centre", "dispersion", "integrated")
    out = {k: _NAN for k in keys} | {f"{k}_err": _NAN for k in keys}
    out["status"] = reason
    return out


def fit_gaussian(v, f, err, *, snr_threshold: float = 3.0) -> dict:
    """Least-squares Gaussian a exp(-(v - c)^2 / (2 s^2)) with scipy's curve_fit, the
    channel errors taken as absolute 1-sigma errors of independent channels (an
    approximation when channels are correlated).  ``status`` is 'ok' or why no fit was made;
    the dispersion is the observed one (instrument not removed)."""
    from scipy.optimize import curve_fit

    ok = np.isfinite(v) & np.isfinite(f) & np.isfinite(err) & (err > 0)
    if ok.sum() < 4:
        return _empty_fit("fewer than 4 channels with data")
    v, f, err = v[ok], f[ok], err[ok]
    peak = int(np.argmax(f))
    if not f[peak] > snr_threshold * err[peak]:
        return _empty_fit(f"peak below {snr_threshold:g} times its error")
    dv = float(np.median(np.abs(np.diff(np.sort(v)))))
    half = f > f[peak] / 2
    s0 = max(dv, 0.5 * dv * half.sum() / 1.1774)

    def gauss(x, a, c, s):
        return a * np.exp(-0.5 * ((x - c) / s) ** 2)

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            p, cov = curve_fit(gauss, v, f, p0=(f[peak], v[peak], s0), sigma=err,
                               absolute_sigma=True, maxfev=4000)
    except (RuntimeError, ValueError):
        return _empty_fit("the fit did not converge")
    e = np.sqrt(np.diag(cov)) if np.all(np.isfinite(cov)) else np.full(3, _NAN)
    a, c, s = float(p[0]), float(p[1]), abs(float(p[2]))
    if not (a > 0 and v.min() <= c <= v.max()):
        return _empty_fit("the fit left the band or turned negative")
    root = math.sqrt(2.0 * math.pi)
    # integral a s sqrt(2 pi); its error with the a-s covariance
    var_int = 2.0 * math.pi * (s ** 2 * cov[0, 0] + a ** 2 * cov[2, 2] + 2 * a * s * cov[0, 2])
    return {"amplitude": a, "amplitude_err": float(e[0]), "centre": c, "centre_err": float(e[1]),
            "dispersion": s, "dispersion_err": float(e[2]), "integrated": a * s * root,
            "integrated_err": math.sqrt(var_int) if var_int >= 0 else _NAN, "status": "ok"}


def line_moments(v, f, err, dv, window) -> dict:
    """Integral, centroid and dispersion (sqrt of the second central moment) of the
    channels with ``window[0] <= v <= window[1]``, with errors propagated to first order
    from independent channel errors (common practice)."""
    sel = np.isfinite(f) & (v >= window[0]) & (v <= window[1])
    if sel.sum() < 2:
        return {k: _NAN for k in ("integrated", "integrated_err", "centroid", "centroid_err",
                                  "dispersion", "dispersion_err")} | {"window": list(window)}
    v, f, e, w = v[sel], f[sel], np.where(np.isfinite(err[sel]), err[sel], 0.0), dv[sel]
    total = float(np.sum(f * w))
    c = float(np.sum(f * v * w) / total) if total else _NAN
    m2 = float(np.sum(f * (v - c) ** 2 * w) / total) if total else _NAN
    total_err = float(np.sqrt(np.sum((e * w) ** 2)))
    c_err = float(np.sqrt(np.sum(((v - c) * e * w) ** 2)) / abs(total)) if total else _NAN
    m2_err = (float(np.sqrt(np.sum((((v - c) ** 2 - m2) * e * w) ** 2)) / abs(total))
              if total else _NAN)
    disp = math.sqrt(m2) if m2 > 0 else _NAN
    return {"integrated": total, "integrated_err": total_err, "centroid": c, "centroid_err": c_err,
            "dispersion": disp, "dispersion_err": m2_err / (2 * disp) if disp > 0 else _NAN,
            "window": [float(window[0]), float(window[1])]}
