"""Channel maps: the images a grid of channel-map panels shows, kept on a result.

``channel_maps(cube, noise=...)`` averages every ``every`` adjacent channels into one
panel image (no channel is skipped, and the noise of a panel drops by about sqrt(every)),
and records each panel's velocity range and noise, so the plots
(:mod:`kinemap.plotting.channels`) need nothing else from the cube.
"""
from __future__ import annotations

import math
import time
import warnings
from dataclasses import dataclass, field
from typing import ClassVar

import astropy.units as u
import numpy as np
from astropy.table import Table

from kinemap.errors import KinemapError
from kinemap.io.products import Product
from kinemap.io.results import StageResult

__all__ = ["channel_maps", "ChannelMaps", "MAX_PANELS", "PANELS_PER_PAGE"]

KMS = u.km / u.s
PANELS_PER_PAGE = 16  # a 4 x 4 grid per page
MAX_PANELS = 20 * PANELS_PER_PAGE  # beyond that nobody reads the pages: ask for --every
DEFAULT_LEVELS = (-3.0, 3.0, 6.0, 12.0, 24.0, 48.0)


@dataclass(frozen=True)
class ChannelMaps(StageResult):
    """Panel images of a channel-map figure.

    images : float array (npanel, ny, nx), the cube's unit; each the mean of ``every``
        adjacent channels (NaN where a pixel has no data).
    velocity, velocity_lo, velocity_hi : float arrays (npanel,), km/s: the mean channel
        velocity of each panel and the edges of the channels it averages.
    noise : float arrays (npanel,): 1-sigma noise of a panel image (cube unit).
    levels : contour levels in units of the panel noise (negative ones are drawn dashed).
    meta : CubeMeta (celestial WCS, beam, conventions).
    """

    name: ClassVar[str] = "channels"

    images: np.ndarray
    velocity: np.ndarray
    velocity_lo: np.ndarray
    velocity_hi: np.ndarray
    noise: np.ndarray
    levels: tuple
    every: int
    meta: object
    settings: dict = field(default_factory=dict)
    seconds: float = 0.0

    @property
    def pages(self) -> list[range]:
        """Panel indices of each page."""
        n = self.images.shape[0]
        return [range(i, min(n, i + PANELS_PER_PAGE)) for i in range(0, n, PANELS_PER_PAGE)]

    def products(self) -> list[Product]:
        t = Table()
        t["panel"] = np.arange(self.images.shape[0], dtype=np.int32)
        t["velocity"] = self.velocity * KMS
        t["velocity_lo"] = self.velocity_lo * KMS
        t["velocity_hi"] = self.velocity_hi * KMS
        t["noise"] = self.noise * self.meta.bunit
        with np.errstate(invalid="ignore"):
            peak = [np.nanmax(im) if np.isfinite(im).any() else np.nan for im in self.images]
        t["peak"] = np.asarray(peak) * self.meta.bunit
        t["page"] = (np.arange(self.images.shape[0]) // PANELS_PER_PAGE + 1).astype(np.int32)
        t.meta.update(channels_per_panel=self.every, contour_levels_in_noise=list(self.levels),
                      convention=self.meta.convention, frame=self.meta.frame)
        return [Product("channel_maps", t, u.one,
                        f"channel-map panels: mean of {self.every} channel(s) each", "table")]

    def summary(self) -> dict:
        return {"panels": int(self.images.shape[0]), "pages": len(self.pages),
                "channels_per_panel": int(self.every),
                "median_panel_noise": float(np.nanmedian(self.noise))}


def _panel_noise(sigma: float, every: int, channel_response: str) -> float:
    """Noise of the mean of ``every`` adjacent channels of noise ``sigma``: independent
    channels, or the correlation Hanning smoothing leaves (rho1 = 2/3, rho2 = 1/6; common
    practice for [1/4, 1/2, 1/4] smoothing of white noise)."""
    rho = (2.0 / 3.0, 1.0 / 6.0) if channel_response == "hanning" else (0.0, 0.0)
    n = every
    var = n + 2 * sum(max(0, n - k) * r for k, r in ((1, rho[0]), (2, rho[1])))
    return sigma * math.sqrt(var) / n


def _check(every, levels, npanel):
    if isinstance(every, bool) or not isinstance(every, (int, np.integer)) or every < 1:
        raise KinemapError(f"'every' must be a whole number of channels >= 1, got {every!r}")
    lv = [float(x) for x in levels]
    if not lv or not all(math.isfinite(x) and x != 0 for x in lv):
        raise KinemapError(f"'levels' must be non-zero multiples of the noise like '3,6,12', "
                           f"got {list(levels)}")
    if npanel > MAX_PANELS:
        raise KinemapError(f"{npanel} channel maps would fill {math.ceil(npanel / PANELS_PER_PAGE)} "
                           f"pages; average more channels per panel (--every "
                           f"{math.ceil(npanel * every / MAX_PANELS)}) or cut the band with --vrange")
    return tuple(sorted(lv))


def channel_maps(cube, *, noise=None, every: int = 1, levels=DEFAULT_LEVELS,
                 channel_response: str = "tophat") -> ChannelMaps:
    """Panel images of a channel-map figure: means of ``every`` adjacent channels.

    Parameters
    ----------
    cube : kinemap.io.cube.Cube
        Read one group of channels at a time (memory: one panel's channels).
    noise : NoiseMap or float, optional
        Noise per channel; its median sets the contour unit.  Default: estimated.
    every : int
        Channels averaged into one panel (the last panel may have fewer).
    levels : sequence of float
        Contour levels in units of the panel noise (e.g. -3, 3, 6, 12).
    channel_response : str
        'hanning' counts the channel correlation in the panel noise.
    """
    t0 = time.perf_counter()
    nchan = cube.nchan
    npanel = math.ceil(nchan / every) if isinstance(every, (int, np.integer)) and every >= 1 else 0
    levels = _check(every, levels, npanel)
    if noise is None:
        from kinemap.maps.noise import estimate_noise

        noise = estimate_noise(cube, channel_response=channel_response)
    sigma = float(np.nanmedian(getattr(noise, "sigma", noise)))
    v = np.asarray(cube.velocity, dtype=np.float64)
    half = 0.5 * cube.channel_width
    images, vel, lo, hi, rms = [], [], [], [], []
    outside = None if cube.footprint is None else ~np.asarray(cube.footprint, bool)
    for k in range(0, nchan, every):
        sl = slice(k, min(nchan, k + every))
        block = np.asarray(cube.data[sl], dtype=np.float32)
        with warnings.catch_warnings():  # an all-NaN pixel is NaN, without a warning
            warnings.simplefilter("ignore", RuntimeWarning)
            img = np.nanmean(block, axis=0)
        if outside is not None:
            img[outside] = np.nan
        images.append(img)
        edges = np.concatenate([v[sl] - half[sl], v[sl] + half[sl]])
        vel.append(float(np.mean(v[sl])))
        lo.append(float(edges.min()))
        hi.append(float(edges.max()))
        rms.append(_panel_noise(sigma, sl.stop - sl.start, channel_response))
    order = np.argsort(vel)  # panels in increasing velocity whatever the axis direction
    return ChannelMaps(images=np.stack(images)[order], velocity=np.asarray(vel)[order],
                       velocity_lo=np.asarray(lo)[order], velocity_hi=np.asarray(hi)[order],
                       noise=np.asarray(rms)[order], levels=levels, every=int(every),
                       meta=cube.meta, settings={"channel_response": channel_response},
                       seconds=time.perf_counter() - t0)
