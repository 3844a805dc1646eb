"""Continuum under the lines: fit it on each spectrum's line-free channels and subtract it.

Optical integral-field and Fabry-Perot cubes arrive with the stellar or nebular continuum
under the emission lines; radio cubes are usually continuum-subtracted already.  Moments
and Gaussian fits of a line on a continuum are biased (moment 0 counts the continuum
under the window, moment 1 is pulled to the window's centre, fitted widths trade off
against it), so this stage runs before the noise and the masks.

Line-free channels (one choice per cube, then per spectrum):

1. every channel, or only those inside the ``line_free`` velocity ranges when given;
2. minus a window around every catalogue line whose rest value falls in the band (rest
   values in the cube's medium: air wavelengths on AWAV axes, vacuum on WAVE, frequencies
   on frequency axes), shifted by the source's velocity, which is read off the peak of the
   cube's mean spectrum (a velocity axis without a rest value has one line, at that peak).
   The window reaches ``line_window`` km/s beyond the emission: the run of mean-spectrum
   channels around the peak that stand above its baseline, so the whole rotation range of
   a disk is masked, not just the velocity of its brighter horn;
3. per spectrum, iterative sigma-clipping (``clip`` sigma, both sides) of what is left
   against the fitted polynomial, which removes lines the catalogue does not know and
   residual wings.

The continuum of each spectrum is a least-squares polynomial in the channel index (degree
0 'constant', 1 'linear', N 'poly:N') on those channels.  Its 1-sigma error comes from the
scatter of the kept channels about the fit (channels taken as independent; Hanning-smoothed
cubes make it optimistic by about sqrt(1.5), which matters only for the 'auto' decision).

'auto' fits a straight line and subtracts when the level or the slope differs from zero
by more than ``AUTO_SIGMA`` times its error in at least ``AUTO_FRACTION`` of the spectra
(then with a straight line if the slopes are significant that often, else a constant), and
leaves the cube untouched otherwise, or when too few line-free channels remain to tell
(a line that fills the band, as in many molecular-cloud cubes).  ``message`` says what it
did in one line.  On large maps the decision is made on every k-th row (about
``AUTO_SPECTRA`` spectra): the fraction is estimated as well from an even subsample.

The subtracted cube is held in memory (float32, the cube's size); with 'none', or when
'auto' subtracts nothing, the input cube is returned as it is (still read from the file).
"""
from __future__ import annotations

import re
import time
from dataclasses import dataclass, field
from typing import ClassVar

import astropy.units as u
import numpy as np

from kinemap.errors import KinemapError
from kinemap.io.products import Product
from kinemap.io.results import StageResult
from kinemap.maps.noise import line_free_channels
from kinemap.parallel.blocks import DEFAULT_MAX_MEMORY, map_blocks, read_rows
from kinemap.spectral.axes import to_velocity
from kinemap.spectral.catalogue import load_catalogue

__all__ = ["ContinuumResult", "subtract_continuum", "parse_method", "line_positions",
           "METHODS", "AUTO_SIGMA", "AUTO_FRACTION"]

METHODS = ("auto", "none", "constant", "linear", "poly:N")
AUTO_SIGMA = 5.0       # a level this many errors from zero is a continuum, not noise
AUTO_FRACTION = 0.10   # ... in at least this fraction of the spectra with a finite fit
MAX_DEGREE = 5
MIN_EXTRA = 3          # line-free channels needed beyond the number of coefficients


def parse_method(method) -> tuple[str, int | None]:
    """'auto' | 'none' | 'constant' | 'linear' | 'poly:N' -> (name, polynomial degree).

    'auto' fits degree 1 to decide; 'none' has no degree.
    """
    text = str(method).strip().lower()
    fixed = {"auto": 1, "none": None, "constant": 0, "linear": 1}
    if text in fixed:
        return text, fixed[text]
    m = re.fullmatch(r"poly:(\d+)", text)
    if m and 0 <= int(m.group(1)) <= MAX_DEGREE:
        return f"poly:{int(m.group(1))}", int(m.group(1))
    raise KinemapError(f"'continuum' must be auto, none, constant, linear or poly:N with N from "
                       f"0 to {MAX_DEGREE}, got {method!r}")


def _method_name(degree: int) -> str:
    return {0: "constant", 1: "linear"}.get(degree, f"poly:{degree}")


def _medium(cube) -> str | None:
    rest = cube.meta.rest_value
    if cube.meta.medium in ("air", "vacuum"):
        return cube.meta.medium
    if rest is None:
        return None
    return "frequency" if rest.unit.is_equivalent(u.Hz) else "vacuum"


def line_positions(cube, *, catalogue=None, margin: float = 0.0) -> dict:
    """``{name: velocity (km/s)}`` of the catalogue lines at rest that fall within
    ``margin`` km/s of the cube's velocity range, on the cube's velocity axis (its
    convention and rest value).  Empty for a cube without a rest value."""
    medium, rest = _medium(cube), cube.meta.rest_value
    if medium is None:
        return {}
    lo, hi = float(np.nanmin(cube.velocity)) - margin, float(np.nanmax(cube.velocity)) + margin
    out = {}
    for name, line in load_catalogue(catalogue).items():
        if medium == "air" and line.is_radio:
            continue
        q = line.rest_value(medium)
        if medium == "vacuum" and cube.meta.medium is None and rest.unit.is_equivalent(u.Hz):
            q = line.rest_value("frequency")
        v = float(to_velocity(u.Quantity([q]), convention=cube.meta.convention,
                              rest_value=rest)[0])
        if lo <= v <= hi:
            out[name] = v
    return out


def _mean_spectrum(cube, nrows: int = 64) -> np.ndarray:
    """Mean spectrum over up to ``nrows`` evenly spaced rows (a sample is enough to find
    the strongest line)."""
    ny = cube.shape[1]
    rows = np.unique(np.linspace(0, ny - 1, min(ny, nrows)).astype(int))
    acc = np.zeros(cube.nchan)
    cnt = np.zeros(cube.nchan)
    for y in rows:
        block = read_rows(cube, slice(int(y), int(y) + 1)).astype(np.float64)
        ok = np.isfinite(block)
        acc += np.where(ok, block, 0.0).sum(axis=(1, 2))
        cnt += ok.sum(axis=(1, 2))
    with np.errstate(invalid="ignore", divide="ignore"):
        return acc / cnt


EMISSION_SIGMA = 3.0     # mean-spectrum channels this many noise sigma above its baseline
EMISSION_FRACTION = 0.02  # ... and above this fraction of the peak are emission


def _emission(cube) -> tuple[float, float, float] | None:
    """(peak, low, high) velocities (km/s) of the line emission in the cube's mean spectrum.

    The baseline is a straight line fitted to the channels below it plus twice the noise
    (lines are positive: only the high side is clipped), the noise being the scatter of
    channel-to-channel differences, which a broad line barely raises (a scatter measured
    about the baseline would, and the clipping would then stall).  The peak is the brightest
    channel above the baseline; low and high bound the run of channels around it that stand
    EMISSION_SIGMA noise and EMISSION_FRACTION of the peak above the baseline.  A rotating
    disk spreads one line over its whole rotation range, so a window around the peak alone
    would leave the other half of its emission among the "line-free" channels.
    """
    spec = _mean_spectrum(cube)
    ok = np.isfinite(spec)
    if ok.sum() < 4:
        return None
    x = np.arange(spec.size, dtype=float)
    noise = 1.4826 * np.median(np.abs(np.diff(spec[ok]))) / np.sqrt(2.0)
    keep = ok.copy()
    for _ in range(20):
        coef = np.polyfit(x[keep], spec[keep], 1)
        new = ok & (spec - np.polyval(coef, x) < 2.0 * noise)
        if new.sum() < 3 or np.array_equal(new, keep):
            break
        keep = new
    res = np.where(ok, spec - np.polyval(coef, x), -np.inf)
    peak = int(np.argmax(res))
    above = res > max(EMISSION_SIGMA * noise, EMISSION_FRACTION * res[peak])
    lo = hi = peak
    while lo > 0 and above[lo - 1]:
        lo -= 1
    while hi < spec.size - 1 and above[hi + 1]:
        hi += 1
    v = cube.velocity
    return float(v[peak]), float(min(v[lo], v[hi])), float(max(v[lo], v[hi]))


def _free_channels(cube, *, line_free, line_window, catalogue):
    """(boolean line-free channels, {line: masked centre km/s}, velocity shift km/s,
    (low, high) extent of the emission about each centre km/s).

    Around every line the window reaches ``line_window`` beyond the emission seen in the
    mean spectrum (the same velocity extent about each line as about the brightest)."""
    v = cube.velocity
    auto = line_free is None or (isinstance(line_free, str) and line_free.lower() == "auto")
    free = np.ones(v.size, bool) if auto else line_free_channels(v, line_free)
    lines = line_positions(cube, catalogue=catalogue, margin=line_window)
    emission = _emission(cube)
    shift, extent = 0.0, (0.0, 0.0)
    if emission is not None:
        peak, lo, hi = emission
        extent = (lo - peak, hi - peak)
        if lines:
            nearest = min(lines.values(), key=lambda lv: abs(lv - peak))
            # the peak belongs to a known line only if it lies within that line's window
            shift = peak - nearest if abs(peak - nearest) <= line_window else 0.0
        else:
            lines = {"peak of the mean spectrum": peak}
    centres = {name: lv + shift for name, lv in lines.items()}
    for c in centres.values():
        free &= (v < c + extent[0] - line_window) | (v > c + extent[1] + line_window)
    return free, centres, shift, extent


def _design(nchan: int, degree: int) -> np.ndarray:
    """Polynomial design matrix (nchan, degree+1) in x = channel scaled to [-1, 1]."""
    x = np.linspace(-1.0, 1.0, nchan) if nchan > 1 else np.zeros(1)
    return np.vander(x, degree + 1, increasing=True)


def _continuum_block(block, *, free, degree, clip, iterations, ref, subtract):
    """Fit (and subtract) the continuum of one block (nchan, rows, nx): the compiled
    per-spectrum kernel (:mod:`kinemap.maps._continuum_kernel`)."""
    from kinemap.maps._continuum_kernel import continuum_kernel

    nchan, rows, nx = block.shape
    ncoef = degree + 1
    out = {"coef": np.empty((ncoef, rows, nx)), "level": np.empty((rows, nx)),
           "level_err": np.empty((rows, nx)), "nfree": np.empty((rows, nx), np.int32)}
    slope = np.empty((rows, nx)) if degree >= 1 else np.empty((1, 1))
    data = (np.empty(block.shape, np.float32) if subtract
            else np.empty((1, 1, 1), np.float32))
    if not block.dtype.isnative:
        block = block.astype(block.dtype.newbyteorder("="))
    continuum_kernel(block, np.ascontiguousarray(free, dtype=np.bool_), _design(nchan, degree),
                     int(ref), float(clip), int(iterations), ncoef + MIN_EXTRA, bool(subtract),
                     out["coef"], out["level"], out["level_err"], out["nfree"], slope, data)
    if degree >= 1:
        out["slope_snr"] = slope
    if subtract:
        out["data"] = data
    return out


@dataclass(frozen=True)
class ContinuumResult(StageResult):
    """The continuum stage: the cube with its continuum removed, and what was removed.

    Attributes
    ----------
    cube : kinemap.io.cube.Cube
        The continuum-subtracted cube (in memory, float32), or the input cube itself when
        nothing was subtracted.
    method : str
        What was subtracted: 'none', 'constant', 'linear' or 'poly:N'.
    requested : str
        What was asked for ('auto', ...).
    message : str
        One line saying what the stage did and why.
    level, level_err : ndarray (ny, nx) or None
        Continuum at the reference velocity and its 1-sigma error, cube unit.
    coefficients : ndarray (degree+1, ny, nx) or None
        Polynomial coefficients in x = channel index scaled to [-1, 1].
    free_channels : ndarray of bool (nchan,)
        The line-free channels before sigma-clipping.
    lines : dict
        The masked line centres (km/s) by name.
    emission_extent : tuple (low, high)
        Velocity extent (km/s) of the emission about each centre, from the mean spectrum;
        the masked window is [centre + low - line_window, centre + high + line_window].
    reference : tuple (str, float)
        Where ``level`` is evaluated: (line name, velocity km/s).
    fraction_significant : float
        Fraction of spectra whose level or slope differs from zero by > AUTO_SIGMA errors.

    Products (only when a continuum was subtracted): ``continuum``, ``continuum_err``
    (maps, cube unit), and with ``write_cube`` the 3D ``continuum_cube``.
    """

    name: ClassVar[str] = "continuum"

    cube: object
    method: str
    requested: str
    message: str
    meta: object = None
    level: np.ndarray | None = None
    level_err: np.ndarray | None = None
    coefficients: np.ndarray | None = None
    free_channels: np.ndarray | None = None
    nchan_free: np.ndarray | None = None
    lines: dict = field(default_factory=dict)
    emission_extent: tuple = (0.0, 0.0)
    reference: tuple = ("", float("nan"))
    fraction_significant: float = float("nan")
    write_cube: bool = False
    seconds: float = 0.0

    @property
    def subtracted(self) -> bool:
        return self.method != "none"

    def continuum_cube(self) -> np.ndarray:
        """The fitted continuum on every channel (nchan, ny, nx), float32, cube unit."""
        if self.coefficients is None:
            raise KinemapError("no continuum was subtracted, so there is no continuum cube")
        ncoef, ny, nx = self.coefficients.shape
        a = _design(self.cube.nchan, ncoef - 1)
        return (a @ self.coefficients.reshape(ncoef, -1)).reshape(-1, ny, nx).astype(np.float32)

    def products(self) -> list[Product]:
        if not self.subtracted:
            return []
        b = self.meta.bunit
        name, vref = self.reference
        out = [Product("continuum", self.level, b,
                       f"continuum level at {name} ({vref:.1f} km/s), {self.method} fit on "
                       "line-free channels", "intensity"),
               Product("continuum_err", self.level_err, b,
                       "1-sigma error of the continuum level", "error", plot=False)]
        if self.write_cube:
            out.append(Product("continuum_cube", self.continuum_cube(), b,
                               f"fitted continuum ({self.method}) on every channel", "cube",
                               plot=False, wcs=self.meta.wcs3d))
        return out

    def summary(self) -> dict:
        name, vref = self.reference
        ok = np.isfinite(self.level) if self.level is not None else np.zeros(0, bool)
        return {"requested": self.requested, "method": self.method, "message": self.message,
                "reference_line": name, "reference_velocity_kms": float(vref),
                "masked_lines": {k: round(float(v), 3) for k, v in self.lines.items()},
                "emission_extent_kms": [round(float(e), 3) for e in self.emission_extent],
                "free_channels": int(np.sum(self.free_channels)) if self.free_channels is not None else 0,
                "fraction_significant": float(self.fraction_significant),
                "median_level": float(np.nanmedian(self.level[ok])) if ok.any() else None}


def _reference(cube, centres, line):
    """(name, velocity, channel) where the continuum level is reported."""
    if line is not None and line in centres:
        name = line
    elif centres:
        name = next(iter(centres))
    else:
        v = float(np.median(cube.velocity))
        return "the band centre", v, cube.nchan // 2
    v = centres[name]
    return name, v, int(np.argmin(np.abs(cube.velocity - v)))


def subtract_continuum(cube, *, method: str = "auto", line=None, line_free="auto",
                       line_window=200.0, clip: float = 3.0, catalogue=None,
                       write_cube: bool = False, max_memory: int = DEFAULT_MAX_MEMORY,
                       progress: bool = False, client=None) -> ContinuumResult:
    """Fit each spectrum's continuum on line-free channels and subtract it.

    Parameters
    ----------
    cube : kinemap.io.cube.Cube
    method : {'auto', 'none', 'constant', 'linear', 'poly:N'}
        Polynomial degree of the continuum (0, 1, N); 'auto' decides whether there is a
        continuum at all (see the module docstring); 'none' returns the cube untouched.
    line : str, optional
        Catalogue line at which the ``continuum`` map is evaluated (default: the first
        catalogue line in the band, else the band centre).
    line_free : 'auto', None or list of (v1, v2) velocity pairs (km/s)
        Only these channels may serve as line-free (the catalogue windows and clipping
        still apply); 'auto' or None: every channel outside the windows.
    line_window : float or Quantity (km/s)
        How far beyond the emission seen in the mean spectrum the window masked around
        every catalogue line in the band reaches.
    clip : float
        Sigma-clipping threshold (both sides) of the per-spectrum fit.
    catalogue : str, optional
        Extra line catalogue (TOML) whose lines are masked too.
    write_cube : bool
        Offer the 3D continuum as the product ``continuum_cube``.

    Returns
    -------
    ContinuumResult
        ``.cube`` is the cube the later stages use.
    """
    from kinemap.units import KMS, to_value

    t0 = time.perf_counter()
    requested, degree = parse_method(method)
    if requested == "none":
        return ContinuumResult(cube=cube, method="none", requested="none", meta=cube.meta,
                               message="continuum: not subtracted (--continuum none)")
    window = float(to_value(line_window, KMS, name="line_window"))
    if not window >= 0:
        raise KinemapError(f"'line_window' must be >= 0 km/s, got {line_window!r}")
    if not clip > 0:
        raise KinemapError(f"'clip' must be a positive number of sigma, got {clip!r}")
    free, centres, _, extent = _free_channels(cube, line_free=line_free, line_window=window,
                                              catalogue=catalogue)
    name, vref, ref = _reference(cube, centres, line)
    common = dict(cube=cube, requested=requested, meta=cube.meta, free_channels=free,
                  lines=centres, emission_extent=extent, reference=(name, vref),
                  write_cube=bool(write_cube))
    if free.sum() < degree + 1 + MIN_EXTRA:
        spans = "; ".join(f"{n}: {c + extent[0]:.0f} to {c + extent[1]:.0f} km/s"
                          for n, c in centres.items())
        text = (f"only {int(free.sum())} channels lie more than {window:g} km/s beyond the "
                f"emission of the lines ({spans or 'none'})")
        if requested == "auto":
            return ContinuumResult(method="none", message=f"continuum: none subtracted: {text}, "
                                   "too few to measure a continuum on", **common)
        raise KinemapError(f"cannot fit a {requested} continuum: {text}; give line-free "
                           "ranges with --line-free or a smaller --line-window")
    kw = dict(max_memory=max_memory, factor=8.0, progress=progress and "continuum",
              client=client, free=free, clip=float(clip), iterations=10, ref=ref)
    fraction = float("nan")
    if requested == "auto":
        stats = _run(_decision_rows(cube), degree=1, subtract=False, **kw)
        sig = np.abs(stats["level"]) > AUTO_SIGMA * stats["level_err"]
        slope = stats["slope_snr"] > AUTO_SIGMA
        finite = np.isfinite(stats["level"])
        nfin = max(int(finite.sum()), 1)
        fraction = float((sig | slope)[finite].sum() / nfin)
        if fraction < AUTO_FRACTION:
            return ContinuumResult(
                method="none", fraction_significant=fraction,
                message=(f"continuum: none found (level beyond {AUTO_SIGMA:g} sigma of zero in "
                         f"{fraction:.1%} of spectra); cube left as it is"), **common)
        degree = 1 if slope[finite].sum() / nfin >= AUTO_FRACTION else 0
    out = _run(cube, degree=degree, subtract=True, **kw)
    used = _method_name(degree)
    level = out["level"]
    med = float(np.nanmedian(level)) if np.isfinite(level).any() else float("nan")
    why = (f" (level or slope beyond {AUTO_SIGMA:g} sigma in {fraction:.0%} of spectra)"
           if requested == "auto" else "")
    message = (f"continuum: subtracted a {used} fit on {int(free.sum())} line-free channels"
               f"{why}; median level {med:.4g} {cube.meta.bunit.to_string() or ''} "
               f"at {name}").rstrip()
    common["cube"] = cube.with_changes(data=out["data"])
    return ContinuumResult(method=used, message=message, level=level,
                           level_err=out["level_err"], coefficients=out["coef"],
                           nchan_free=out["nfree"], fraction_significant=fraction,
                           seconds=time.perf_counter() - t0, **common)


AUTO_SPECTRA = 20000  # 'auto' decides on about this many spectra (every k-th row)


def _decision_rows(cube):
    """Every k-th row of ``cube``, about AUTO_SPECTRA spectra: the fraction of spectra with
    a continuum is estimated as well from an even subsample, and radio cubes (the usual
    case: nothing to subtract) then pay a fraction of a full fitting pass."""
    ny, nx = cube.shape[1:]
    step = max(1, (ny * nx) // AUTO_SPECTRA)
    if step == 1:
        return cube
    fp = None if cube.footprint is None else cube.footprint[::step]
    return cube.with_changes(data=cube.data[:, ::step, :], footprint=fp)


def _run(cube, *, degree, subtract, **kw):
    nchan = cube.nchan
    outputs = {"coef": ((degree + 1,), np.float64, np.nan), "level": ((), np.float64, np.nan),
               "level_err": ((), np.float64, np.nan), "nfree": ((), np.int32, 0)}
    if degree >= 1:
        outputs["slope_snr"] = ((), np.float64, np.nan)
    if subtract:
        outputs["data"] = ((nchan,), np.float32, np.nan)
    return map_blocks(cube, _continuum_block, outputs=outputs, degree=degree,
                      subtract=subtract, **kw)


def line_window_range(cube, line: str, *, centres=None, catalogue=None) -> list | None:
    """Velocity window [v1, v2] (km/s) of ``line`` that stops short of its neighbours.

    The window is centred on the line (at the source's velocity when ``centres``, the
    masked line centres of :func:`subtract_continuum`, has it; else at rest) and reaches
    halfway to the nearest other catalogue line in the band, so the moments of one line
    do not take in the next.  None when no other line is in the band (the whole band).
    """
    lines = dict(centres or {}) if centres and line in centres else line_positions(
        cube, catalogue=catalogue)
    if line not in lines:
        return None
    centre = lines[line]
    others = [abs(v - centre) for name, v in lines.items()
              if name != line and not name.startswith("peak")]
    if not others:
        return None
    half = 0.5 * min(others)
    return [centre - half, centre + half]
