"""The 3D disk model: a tilted-ring disk observed through the beam and the channels.

A :class:`DiskModel` turns ring parameters into a model cube on the pixel grid and
channels of an observation:

1. Rings at radii R_k carry rotation v_rot, expansion v_exp, dispersion sigma, face-on
   surface brightness Sigma and geometry (centre, PA, inclination, v_sys).  Between ring
   centres every parameter is interpolated linearly in radius; inside the first ring
   v_rot and v_exp fall linearly to 0 at the centre and the others stay constant; beyond the last
   ring centre they stay constant out to R_last + width/2, where the disk ends.
2. The disk plane is sampled on a polar grid (steps of ``pixel / oversample``), at
   ``n_z`` heights when it has a thickness (equal-mass quantiles of a sech^2(z/h)
   profile, z_q = h artanh(2q - 1)).  Each sample emits a Gaussian line at the Begeman
   (1989) line-of-sight velocity, integrated over the channel (top-hat) or sampled at
   its centre ('none'), and is deposited bilinearly onto the pixels
   (:mod:`kinemap.rings._disk3d_kernel`).
3. Each channel is convolved with the elliptical Gaussian beam by FFT (scipy.fft) on a
   grid padded by 5 beam sigmas (no wrap-around), with the one-pixel smoothing of the
   bilinear deposit divided out in Fourier space; a Hanning response then smooths along
   the spectral axis with [1/4, 1/2, 1/4] (:mod:`kinemap.spectral.response`).

Units: Sigma is the face-on surface brightness in (cube unit) x km/s, so a pixel's
velocity-integrated model is Sigma / cos(i) for a thin disk seen without a beam; the
cube's total flux (sum x |dv| x pixel area) is the integral of Sigma over the disk.
The model conserves flux exactly: the deposit shares each sample's flux between pixels
and the beam kernel is normalised to a sum of 1.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import scipy.fft as sfft

from kinemap.errors import KinemapError
from kinemap.rings import _disk3d_kernel as kern
from kinemap.spectral.response import check_response

__all__ = ["DiskModel", "beam_kernel", "RING_PARAMS", "GEOM_PARAMS"]

GEOM_PARAMS = ("x_center", "y_center", "position_angle", "inclination", "v_sys")
RING_PARAMS = ("v_rot", "v_exp", "dispersion", "surface_brightness")
_FWHM = 2.0 * np.sqrt(2.0 * np.log(2.0))  # FWHM / sigma of a Gaussian (exact)
_GOLDEN = 0.6180339887498949


def beam_kernel(shape, major, minor, pa_deg, jac):
    """Normalised elliptical Gaussian beam on a periodic grid (centre at [0, 0]).

    ``major``, ``minor`` are FWHM in arcsec; pixel offsets are turned into (east, north)
    arcsec through ``jac`` (arcsec per pixel), so the beam's PA (deg east of north) is
    right on any grid.  Sum = 1, so convolution conserves flux."""
    ny, nx = shape
    dy = np.fft.fftfreq(ny) * ny
    dx = np.fft.fftfreq(nx) * nx
    ddx, ddy = np.meshgrid(dx, dy)
    east = jac[0][0] * ddx + jac[0][1] * ddy
    north = jac[1][0] * ddx + jac[1][1] * ddy
    pa = np.deg2rad(pa_deg)
    # beam major axis at PA east of north
    along = east * np.sin(pa) + north * np.cos(pa)
    across = east * np.cos(pa) - north * np.sin(pa)
    smaj, smin = major / _FWHM, minor / _FWHM
    k = np.exp(-0.5 * ((along / smaj) ** 2 + (across / smin) ** 2))
    return k / k.sum()


def _sech2_nodes(h, n):
    """Equal-mass height nodes of a sech^2(z/h) layer (CDF (1 + tanh(z/h)) / 2)."""
    if h <= 0 or n <= 1:
        return np.zeros(1), np.ones(1)
    q = (np.arange(n) + 0.5) / n
    return h * np.arctanh(2 * q - 1), np.full(n, 1.0 / n)


@dataclass(eq=False)
class DiskModel:
    """Model cubes of a ring disk on an observation's pixels and channels.

    Parameters
    ----------
    shape : (nchan, ny, nx)
    jac : 2x2 array
        Pixel offset (dx, dy) -> (east, north) arcsec (:class:`kinemap.rings.grid.SkyGrid`).
    velocity : ndarray (nchan,)
        Channel-centre velocities, km/s, uniformly spaced (either direction).
    radii : ndarray
        Ring centres, arcsec, increasing.
    width : float
        Ring width, arcsec; the disk ends at radii[-1] + width / 2.
    beam : (major, minor, pa) or None
        FWHM in arcsec and PA in degrees east of north; None: no convolution.
    response : {'tophat', 'hanning', 'none'}
    scale_height : float
        sech^2 scale height h in arcsec (0: thin disk).
    oversample : int
        Disk-plane samples per pixel step (radial and azimuthal).
    n_z : int
        Height nodes when ``scale_height > 0``.
    """

    shape: tuple
    jac: np.ndarray
    velocity: np.ndarray
    radii: np.ndarray
    width: float
    beam: tuple | None = None
    response: str = "tophat"
    scale_height: float = 0.0
    oversample: int = 4
    n_z: int = 7
    _cache: dict = field(default_factory=dict, repr=False)

    def __post_init__(self):
        self.jac = np.asarray(self.jac, float)
        self.jinv = np.linalg.inv(self.jac)
        self.velocity = np.asarray(self.velocity, float)
        self.radii = np.asarray(self.radii, float)
        self.response = check_response(self.response)
        nchan, ny, nx = self.shape
        if nchan > 1:
            steps = np.diff(self.velocity)
            if np.ptp(steps) > 1e-3 * np.abs(steps).mean():
                raise KinemapError("the 3D model needs uniformly spaced channels in velocity; "
                                   "regrid the cube to a linear velocity axis")
            self.dv = float(steps.mean())
        else:
            self.dv = 1.0
        self.pix = float(np.sqrt(abs(np.linalg.det(self.jac))))
        self.pix_area = self.pix ** 2
        if self.radii.ndim != 1 or self.radii.size < 1 or np.any(np.diff(self.radii) <= 0):
            raise KinemapError("'radii' must be increasing ring radii in arcsec")
        if self.beam is not None:
            smaj_pix = self.beam[0] / _FWHM / self.pix
            self.margin = int(np.ceil(5 * smaj_pix)) + 2
        else:
            self.margin = 2
        self.pad_shape = (sfft.next_fast_len(ny + 2 * self.margin),
                          sfft.next_fast_len(nx + 2 * self.margin))
        self.z_nodes, self.z_weights = _sech2_nodes(float(self.scale_height), int(self.n_z))
        self.r_out = float(self.radii[-1] + self.width / 2)
        dr = self.pix / max(int(self.oversample), 1)
        n_ann = max(int(np.ceil(self.r_out / dr)), 1)
        edges = np.linspace(0.0, self.r_out, n_ann + 1)
        r1, r2 = edges[:-1], edges[1:]
        # samples at the area-weighted mean radius of their annulus, so that the radial sum
        # integrates f(R) R dR exactly for f linear in R (midpoint radii are off by dr^2/12)
        self.r_mid = 2.0 / 3.0 * (r2**3 - r1**3) / (r2**2 - r1**2)
        area = np.pi * (r2**2 - r1**2)
        self.n_az = np.maximum(8, np.ceil(2 * np.pi * self.r_mid / dr)).astype(np.int64)
        self.az0 = (np.arange(n_ann) * _GOLDEN % 1.0) * 2 * np.pi / self.n_az
        # flux of one sample per unit Sigma, as cube values: / pixel area / channel width
        self.unit_weight = area / self.n_az / self.pix_area / abs(self.dv)
        # annuli touched by ring k's parameters: r_mid inside (R_{k-1}, R_{k+1})
        lo = np.concatenate([[0.0], self.radii[:-1]])
        hi = np.concatenate([self.radii[1:], [np.inf]])
        self.ring_annuli = [(int(np.searchsorted(self.r_mid, lo[k], "right")),
                             int(np.searchsorted(self.r_mid, hi[k], "left")))
                            for k in range(self.radii.size)]

    # ------------------------------------------------------------------ interpolation
    def annuli(self, p: dict) -> dict:
        """Per-annulus arrays of ring parameters ``p`` (per-ring arrays; see RING_PARAMS
        and GEOM_PARAMS) interpolated linearly in radius."""
        r, R = self.r_mid, self.radii

        def lin(v):
            return np.interp(r, R, np.broadcast_to(np.asarray(v, float), R.shape))

        def from_zero(v):  # a velocity of the disk plane: 0 at the centre (no kink there)
            return np.interp(r, np.concatenate([[0.0], R]),
                             np.concatenate([[0.0], np.broadcast_to(np.asarray(v, float), R.shape)]))

        vrot = from_zero(p["v_rot"])
        pa = np.deg2rad(lin(p["position_angle"]))
        inc = np.deg2rad(lin(p["inclination"]))
        return dict(vrot=vrot, vexp=from_zero(p.get("v_exp", 0.0)), disp=lin(p["dispersion"]),
                    sb=lin(p.get("surface_brightness", 1.0)), x0=lin(p["x_center"]),
                    y0=lin(p["y_center"]), sin_pa=np.sin(pa), cos_pa=np.cos(pa),
                    sin_i=np.sin(inc), cos_i=np.cos(inc), vsys=lin(p["v_sys"]))

    # ------------------------------------------------------------------ rendering
    def _nchan_render(self):
        return self.shape[0] + (2 if self.response == "hanning" else 0)

    def _deposit(self, ann, a_lo, a_hi, out, off_x, off_y, weight, chan0=0):
        first = 1 if self.response == "hanning" else 0
        u0 = self.velocity[0] + (chan0 - first) * self.dv
        kern.deposit(out, a_lo, a_hi, self.r_mid, self.n_az, self.az0, weight, ann["vrot"],
                     ann["vexp"], ann["disp"], ann["x0"], ann["y0"], ann["sin_pa"], ann["cos_pa"],
                     ann["sin_i"], ann["cos_i"], ann["vsys"], self.z_nodes, self.z_weights,
                     self.jinv, float(off_x), float(off_y), float(u0), 1.0 / self.dv,
                     self.response != "none", min(out.shape[0], 8))

    def _transfer(self, shape, single=False):
        key = ("tf", shape, single)
        if single:
            if key not in self._cache:
                self._cache[key] = self._transfer(shape).astype(np.complex64)
            return self._cache[key]
        if key not in self._cache:
            b = self.beam
            k = beam_kernel(shape, b[0], b[1], b[2], self.jac)
            # the bilinear deposit smooths by a triangle of one pixel (Fourier window
            # sinc^2 per axis; common practice in particle-mesh codes): divide it out, which
            # is safe because the beam has suppressed the high frequencies where it is small
            wy = np.sinc(np.fft.fftfreq(shape[0])) ** 2
            wx = np.sinc(np.fft.rfftfreq(shape[1])) ** 2
            self._cache[key] = sfft.rfft2(k) / (wy[:, None] * wx[None, :])
        return self._cache[key]

    def _observe(self, padded, single=False):
        """Beam convolution (FFT) and Hanning smoothing of a deposited cube; ``single``:
        the FFTs in single precision (half the time; enough for Jacobian columns, whose
        relative precision of 1e-6 is far below any finite-difference error)."""
        if single:
            padded = padded.astype(np.float32)
        if self.beam is not None:
            tf = self._transfer(padded.shape[1:], single)
            padded = sfft.irfft2(sfft.rfft2(padded, axes=(1, 2), workers=-1) * tf,
                                 s=padded.shape[1:], axes=(1, 2), workers=-1)
        if self.response == "hanning":
            padded = 0.25 * padded[:-2] + 0.5 * padded[1:-1] + 0.25 * padded[2:]
        return padded

    def render(self, p: dict) -> np.ndarray:
        """The model cube (nchan, ny, nx), float64, in the cube's unit."""
        ann = self.annuli(p)
        nchan, ny, nx = self.shape
        out = np.zeros((self._nchan_render(), *self.pad_shape))
        self._deposit(ann, 0, self.r_mid.size, out, self.margin, self.margin,
                      ann["sb"] * self.unit_weight)
        m = self.margin
        return self._observe(out)[:, m:m + ny, m:m + nx]

    def ring_box(self, p: dict, k: int):
        """Pixel box (y slice, x slice) of the cube that ring k's parameters can change."""
        a_lo, a_hi = self.ring_annuli[k]
        r = self.r_mid[min(a_hi, self.r_mid.size) - 1] + self.pix
        reach = r * np.abs(self.jinv).sum(axis=1).max() + self.margin
        x0 = float(np.interp(r, self.radii, np.broadcast_to(p["x_center"], self.radii.shape)))
        y0 = float(np.interp(r, self.radii, np.broadcast_to(p["y_center"], self.radii.shape)))
        _, ny, nx = self.shape
        ys = slice(max(0, int(np.floor(y0 - reach))), min(ny, int(np.ceil(y0 + reach)) + 1))
        xs = slice(max(0, int(np.floor(x0 - reach))), min(nx, int(np.ceil(x0 + reach)) + 1))
        return ys, xs

    def ring_window(self, ann, k: int):
        """Render channels (start, stop) that the emission of ring k's annuli can reach:
        the line of sight spans v_sys +- sin(i) |v| plus six dispersions and a channel."""
        a_lo, a_hi = self.ring_annuli[k]
        n_r = self._nchan_render()
        if a_hi <= a_lo:
            return 0, 0
        sl = slice(a_lo, a_hi)
        speed = (np.minimum(np.abs(ann["sin_i"][sl]) + 0.05, 1.0)
                 * np.hypot(ann["vrot"][sl], ann["vexp"][sl]))
        reach = speed + kern._NSIG * ann["disp"][sl] + 2 * abs(self.dv)
        first = 1 if self.response == "hanning" else 0
        u0 = self.velocity[0] - first * self.dv
        ends = (np.r_[ann["vsys"][sl] - reach, ann["vsys"][sl] + reach] - u0) / self.dv
        lo = max(int(np.floor(ends.min())) - 1, 0)
        hi = min(int(np.ceil(ends.max())) + 2, n_r)
        return lo, max(hi, lo)

    def _pads(self, box):
        """Padding (y, x) of a box's FFT grid before its start: a box from
        :meth:`ring_box` already holds the beam's reach around the ring's emission,
        except where the cube's edge cut it; only there the grid is padded by the
        margin (emission just outside the cube still reaches it through the beam)."""
        _, ny, nx = self.shape
        m = self.margin
        ys, xs = box
        return ((m if ys.start == 0 else 0, m if ys.stop == ny else 0),
                (m if xs.start == 0 else 0, m if xs.stop == nx else 0))

    def _box_cubes(self, box, window, count):
        (py0, py1), (px0, px1) = self._pads(box)
        ys, xs = box
        shape = (sfft.next_fast_len(ys.stop - ys.start + py0 + py1),
                 sfft.next_fast_len(xs.stop - xs.start + px0 + px1))
        return [np.zeros((window[1] - window[0], *shape)) for _ in range(count)]

    def _box_offsets(self, box):
        """Pixel offsets (x, y) of the cube's grid on a box's FFT grid."""
        (py0, _), (px0, _) = self._pads(box)
        return float(px0 - box[1].start), float(py0 - box[0].start)

    def _cut(self, cube, box, single=False):
        """Observed box cube, cropped to the box; channels stay those of the window less
        the two Hanning edges (see :meth:`window_channels`)."""
        (py0, _), (px0, _) = self._pads(box)
        ny, nx = box[0].stop - box[0].start, box[1].stop - box[1].start
        if cube.shape[0] < (3 if self.response == "hanning" else 1):
            return np.zeros((0, ny, nx))
        return self._observe(cube, single)[:, py0:py0 + ny, px0:px0 + nx]

    def window_channels(self, window):
        """Output channels (start, stop) of a render window after :meth:`_observe`."""
        lo, hi = window
        if self.response == "hanning":
            return lo, max(hi - 2, lo)
        return lo, hi

    def render_rings(self, p: dict, k: int, box=None, window=None, ann=None):
        """Contribution of the annuli ring k's parameters touch, on the box of
        :meth:`ring_box` (or ``box``) and the render channels ``window`` (default
        :meth:`ring_window`): what changes when ring k's parameters change.  Returns the
        cube and its first output channel."""
        a_lo, a_hi = self.ring_annuli[k]
        ys, xs = box if box is not None else self.ring_box(p, k)
        ann = self.annuli(p) if ann is None else ann
        window = self.ring_window(ann, k) if window is None else window
        (out,) = self._box_cubes((ys, xs), window, 1)
        if a_hi > a_lo and out.shape[0]:
            self._deposit(ann, a_lo, a_hi, out, *self._box_offsets((ys, xs)),
                          ann["sb"] * self.unit_weight, window[0])
        return self._cut(out, (ys, xs)), self.window_channels(window)[0]

    def ring_weights(self, k: int):
        """Interpolation weight of ring k's parameters at every annulus: (velocities,
        which fall to 0 at the centre; the other parameters)."""
        e = np.zeros(self.radii.size)
        e[k] = 1.0
        h_vel = np.interp(self.r_mid, np.r_[0.0, self.radii], np.r_[0.0, e])
        return h_vel, np.interp(self.r_mid, self.radii, e)

    def ring_gradients(self, p: dict, k: int, box, window, *, expansion=False):
        """Exact derivatives of the model on ``box`` / ``window`` with respect to ring
        k's v_rot, dispersion (and v_exp with ``expansion``): a dict of name -> cube,
        from :func:`kinemap.rings._disk3d_kernel.deposit_grad` observed like a model."""
        a_lo, a_hi = self.ring_annuli[k]
        ys, xs = box
        ann = self.annuli(p)
        h_vel, h_lin = self.ring_weights(k)
        out_u, out_s = self._box_cubes(box, window, 2)
        w = ann["sb"] * self.unit_weight
        zero = np.zeros_like(h_vel)
        clamp = ann["disp"] * abs(1.0 / self.dv) > 1e-6
        c_s = np.where(clamp, h_lin, 0.0) / abs(self.dv)
        grads = {}
        if a_hi > a_lo and out_u.shape[0]:
            self._deposit_grad(ann, a_lo, a_hi, out_u, out_s, w, h_vel * ann["sin_i"] / self.dv,
                               zero, c_s, xs, ys, window[0])
        grads["v_rot"] = self._cut(out_u, box, single=True)
        grads["dispersion"] = self._cut(out_s, box, single=True)
        if expansion:
            out_e, scratch = self._box_cubes(box, window, 2)
            if a_hi > a_lo and out_e.shape[0]:
                self._deposit_grad(ann, a_lo, a_hi, out_e, scratch, w, zero,
                                   h_vel * ann["sin_i"] / self.dv, zero, xs, ys, window[0])
            grads["v_exp"] = self._cut(out_e, box, single=True)
        return grads

    def _deposit_grad(self, ann, a_lo, a_hi, out_u, out_s, weight, cu_cos, cu_sin, c_s, xs,
                      ys, chan0):
        first = 1 if self.response == "hanning" else 0
        u0 = self.velocity[0] + (chan0 - first) * self.dv
        kern.deposit_grad(out_u, out_s, a_lo, a_hi, self.r_mid, self.n_az, self.az0, weight,
                          cu_cos, cu_sin, c_s, ann["disp"], ann["vrot"], ann["vexp"], ann["x0"],
                          ann["y0"], ann["sin_pa"], ann["cos_pa"], ann["sin_i"], ann["cos_i"],
                          ann["vsys"], self.z_nodes, self.z_weights, self.jinv,
                          *self._box_offsets((ys, xs)),
                          float(u0), 1.0 / self.dv, self.response != "none",
                          min(out_u.shape[0], 8))

    def surface_basis(self, p: dict) -> np.ndarray:
        """Observed moment-0 maps (n_rings, ny, nx) of each ring's hat function of unit
        Sigma: the model's moment 0 is sum_k Sigma_k basis_k (linear in Sigma)."""
        ann = self.annuli(p)
        n = self.radii.size
        _, ny, nx = self.shape
        m = self.margin
        out = np.zeros((n, *self.pad_shape))
        for k in range(n):
            hat = np.zeros(n)
            hat[k] = 1.0
            w = np.interp(self.r_mid, self.radii, hat) * self.unit_weight * abs(self.dv)
            kern.deposit_surface(out[k], 0, self.r_mid.size, self.r_mid, self.n_az, self.az0, w,
                                 ann["x0"], ann["y0"], ann["sin_pa"], ann["cos_pa"], ann["sin_i"],
                                 ann["cos_i"], self.z_nodes, self.z_weights, self.jinv,
                                 float(m), float(m))
        if self.beam is not None:
            tf = self._transfer(self.pad_shape)
            out = sfft.irfft2(sfft.rfft2(out, axes=(1, 2)) * tf, s=self.pad_shape, axes=(1, 2))
        return out[:, m:m + ny, m:m + nx]
