"""Velocity axes: validation, channel edges and the one-channel extension used by Hanning."""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from kinemap.units import KMS, to_value
from kinemap.errors import KinemapError

__all__ = ["Axes", "prepare_axes"]


@dataclass(frozen=True, eq=False)
class Axes:
    """Channel-centre velocities and edges of every axis (km/s, float64).

    ``edges_ext[a, k]`` for ``k = 0 .. nchan + 2`` are the edges of channels ``-1 .. nchan``
    (one extrapolated channel beyond each end, spacing copied from the end channels):
    channel ``c`` spans ``edges_ext[a, c + 1] .. edges_ext[a, c + 2]``.  Interior edges are
    midpoints between channel centres, so non-uniform axes are handled.
    """

    centres: np.ndarray  # (naxes, nchan)
    edges_ext: np.ndarray  # (naxes, nchan + 3)
    inv_width_ext: np.ndarray  # (naxes, nchan + 2): sqrt(2 pi) / signed width of channels -1..nchan
    channel_width: np.ndarray  # (naxes,) median |dv|
    band_min: np.ndarray  # (naxes,) lowest channel edge
    band_max: np.ndarray  # (naxes,) highest channel edge

    @property
    def nchan(self) -> int:
        return self.centres.shape[1]

    @property
    def naxes(self) -> int:
        return self.centres.shape[0]


def prepare_axes(velocity, *, nchan: int | None = None, naxes: int = 1) -> Axes:
    """Validate channel-centre velocities (km/s or a Quantity) and derive edges.

    Parameters
    ----------
    velocity : array-like, shape (nchan,) or (naxes, nchan)
        Channel-centre velocities, km/s if plain numbers.  Each row must be finite and
        strictly monotonic (increasing or decreasing).
    nchan : int, optional
        Number of channels the data have; checked against the axis length.
    naxes : int
        Number of axes the model needs (rows beyond are allowed and ignored).
    """
    v = to_value(velocity, KMS, name="velocity")
    v = np.array(v, dtype=np.float64, ndmin=1)
    if v.ndim == 1:
        v = v[None, :]
    if v.ndim != 2:
        raise KinemapError(
            f"'velocity' must have shape (nchan,) or (naxes, nchan), got shape {v.shape}"
        )
    if nchan is not None and v.shape[1] != nchan:
        raise KinemapError(
            f"'velocity' has {v.shape[1]} channels but the data have {nchan}; pass one velocity per channel"
        )
    if v.shape[1] < 3:
        raise KinemapError(f"'velocity' must have at least 3 channels, got {v.shape[1]}")
    if v.shape[0] < naxes:
        raise KinemapError(
            f"'velocity' has {v.shape[0]} axes but the model uses {naxes}; pass one row per line axis"
        )
    if not np.all(np.isfinite(v)):
        raise KinemapError("'velocity' contains NaN or infinite values; pass finite channel velocities")
    dv = np.diff(v, axis=1)
    mono = np.all(dv > 0, axis=1) | np.all(dv < 0, axis=1)
    if not np.all(mono):
        bad = int(np.flatnonzero(~mono)[0])
        raise KinemapError(
            f"'velocity' row {bad} is not strictly monotonic; channel velocities must all increase or all decrease"
        )
    ce = np.concatenate([v[:, :1] - dv[:, :1], v, v[:, -1:] + dv[:, -1:]], axis=1)
    dce = np.diff(ce, axis=1)
    edges = np.concatenate(
        [ce[:, :1] - 0.5 * dce[:, :1], 0.5 * (ce[:, 1:] + ce[:, :-1]), ce[:, -1:] + 0.5 * dce[:, -1:]],
        axis=1,
    )
    real = edges[:, 1:-1]  # edges of channels 0..nchan-1
    return Axes(
        centres=np.ascontiguousarray(v),
        edges_ext=np.ascontiguousarray(edges),
        inv_width_ext=np.ascontiguousarray(np.sqrt(2 * np.pi) / np.diff(edges, axis=1)),
        channel_width=np.median(np.abs(dv), axis=1),
        band_min=real.min(axis=1),
        band_max=real.max(axis=1),
    )
