"""Compiled kernel of the 3D disk model: emission deposited into a cube (private).

The disk is sampled on a deterministic polar grid in its own plane (annuli of width
``dr``, azimuthal steps of about ``dr``), optionally at a few heights ``z`` (equal-mass
quantiles of the vertical profile).  Every sample is projected to the sky, gets its
line-of-sight velocity (Begeman 1989, A&A 223, 47)::

    v = v_sys + sin(i) [v_rot cos(theta) + v_exp sin(theta)]

and a Gaussian line of dispersion sigma, integrated over each channel (top-hat response)
or sampled at the channel centre ('none'), and is shared between the four nearest pixel
centres (bilinear, "cloud in cell"; common practice in particle-mesh codes), which
conserves its flux exactly.  Beam convolution and Hanning smoothing are done afterwards
in :mod:`kinemap.rings.disk3d` (they are linear and commute with the deposit).

Parallelism: threads own disjoint blocks of channels, so no two threads write the same
voxel and no atomics or per-thread copies of the cube are needed.
"""
from __future__ import annotations

import math

import numba as nb
import numpy as np

_INV_SQRT2 = 1.0 / math.sqrt(2.0)
_INV_SQRT2PI = 1.0 / math.sqrt(2.0 * math.pi)
# a Gaussian beyond 6 sigma carries < 1e-9 of its flux: channels further out are skipped
_NSIG = 6.0


@nb.njit(cache=True, inline="always")
def _to_pixel(xd, yd, z, cos_i, sin_i, sin_pa, cos_pa, xc, yc, jinv):
    """Pixel position of the disk point (xd along the receding major axis, yd across it,
    height z; arcsec) of a ring centred on pixel (xc, yc): tilt by the inclination, turn
    by the position angle to (east, north), then through the inverse pixel Jacobian."""
    big_y = yd * cos_i + z * sin_i
    east = xd * sin_pa + big_y * cos_pa
    north = xd * cos_pa - big_y * sin_pa
    return (xc + jinv[0, 0] * east + jinv[0, 1] * north,
            yc + jinv[1, 0] * east + jinv[1, 1] * north)


@nb.njit(cache=True, parallel=True, fastmath=False)
def deposit(out, a_lo, a_hi, r_mid, n_az, az0, weight, vrot, vexp, disp, x0, y0, sin_pa, cos_pa,
            sin_i, cos_i, vsys, z_nodes, z_weights, jinv, off_x, off_y, u0, inv_dv, tophat,
            nblocks):
    """Add the emission of annuli ``a_lo <= a < a_hi`` to ``out`` (nchan, ny, nx).

    Per-annulus arrays (all already interpolated to the annulus' mid radius ``r_mid``,
    arcsec): ``n_az`` azimuthal samples starting at ``az0`` (rad), flux ``weight`` per
    sample (cube unit, already divided by pixel area and channel width), kinematics in
    km/s, geometry as sines/cosines, centre (x0, y0) in pixels.  ``jinv`` turns (east,
    north) arcsec into pixel offsets; ``off_x``, ``off_y`` shift the output grid (padding
    or a sub-box).  Velocities become channel indices by ``(v - u0) * inv_dv`` (channel j
    covers indices j - 1/2 .. j + 1/2; ``inv_dv`` may be negative).
    """
    nchan, ny, nx = out.shape
    nz = z_nodes.size
    adv = abs(inv_dv)
    for b in nb.prange(nblocks):
        c0 = (b * nchan) // nblocks
        c1 = ((b + 1) * nchan) // nblocks
        for a in range(a_lo, a_hi):
            w_a = weight[a]
            if w_a == 0.0:
                continue
            r = r_mid[a]
            m = n_az[a]
            step = 2.0 * math.pi / m
            s_idx = max(disp[a] * adv, 1e-6)
            inv_s = 1.0 / s_idx
            for t in range(m):
                th = az0[a] + t * step
                ct = math.cos(th)
                st = math.sin(th)
                xd = r * ct
                yd = r * st
                vlos = vsys[a] + sin_i[a] * (vrot[a] * ct + vexp[a] * st)
                uc = (vlos - u0) * inv_dv
                j_lo = max(c0, int(math.floor(uc - _NSIG * s_idx - 1.0)))
                j_hi = min(c1, int(math.ceil(uc + _NSIG * s_idx + 1.0)) + 1)
                if j_lo >= j_hi:
                    continue
                for iz in range(nz):
                    px, py = _to_pixel(xd, yd, z_nodes[iz], cos_i[a], sin_i[a], sin_pa[a],
                                       cos_pa[a], x0[a] + off_x, y0[a] + off_y, jinv)
                    ix = int(math.floor(px))
                    iy = int(math.floor(py))
                    if ix < -1 or iy < -1 or ix >= nx or iy >= ny:
                        continue
                    fx = px - ix
                    fy = py - iy
                    wz = w_a * z_weights[iz]
                    w00 = wz * (1.0 - fx) * (1.0 - fy)
                    w01 = wz * fx * (1.0 - fy)
                    w10 = wz * (1.0 - fx) * fy
                    w11 = wz * fx * fy
                    prev = 0.5 * math.erfc(-((j_lo - 0.5 - uc) * inv_s) * _INV_SQRT2)
                    for j in range(j_lo, j_hi):
                        if tophat:
                            cur = 0.5 * math.erfc(-((j + 0.5 - uc) * inv_s) * _INV_SQRT2)
                            f = cur - prev
                            prev = cur
                        else:
                            q = (j - uc) * inv_s
                            f = math.exp(-0.5 * q * q) * inv_s * _INV_SQRT2PI
                        if f == 0.0:
                            continue
                        if iy >= 0:
                            if ix >= 0:
                                out[j, iy, ix] += w00 * f
                            if ix + 1 < nx:
                                out[j, iy, ix + 1] += w01 * f
                        if iy + 1 < ny:
                            if ix >= 0:
                                out[j, iy + 1, ix] += w10 * f
                            if ix + 1 < nx:
                                out[j, iy + 1, ix + 1] += w11 * f


@nb.njit(cache=True, parallel=True, fastmath=False)
def deposit_grad(out_u, out_s, a_lo, a_hi, r_mid, n_az, az0, weight, cu_cos, cu_sin, c_s,
                 disp, vrot, vexp, x0, y0, sin_pa, cos_pa, sin_i, cos_i, vsys, z_nodes,
                 z_weights, jinv, off_x, off_y, u0, inv_dv, tophat, nblocks):
    """Derivatives of :func:`deposit` with respect to one ring's kinematic parameters.

    A sample's line centre (channel index) is ``uc`` and its width (channels) ``s``; the
    channel fractions f_j(uc, s) are differentiated exactly (for the top-hat,
    f_j = Phi(b) - Phi(a) with a, b the channel's edges in units of s, so
    df/duc = (phi(a) - phi(b)) / s and df/ds = (a phi(a) - b phi(b)) / s).  ``out_u`` gets
    df/duc x (cu_cos[a] cos(theta) + cu_sin[a] sin(theta)), ``out_s`` gets
    df/ds x c_s[a]: with cu_cos = h sin(i) / dv the column of v_rot (h: the ring's
    interpolation weight at the annulus), cu_sin the same for v_exp, c_s = h / |dv| the
    column of the dispersion.  Same sampling, deposit and channel blocks as
    :func:`deposit`.
    """
    nchan, ny, nx = out_u.shape
    nz = z_nodes.size
    adv = abs(inv_dv)
    for b in nb.prange(nblocks):
        c0 = (b * nchan) // nblocks
        c1 = ((b + 1) * nchan) // nblocks
        for a in range(a_lo, a_hi):
            w_a = weight[a]
            if w_a == 0.0:
                continue
            r = r_mid[a]
            m = n_az[a]
            step = 2.0 * math.pi / m
            s_idx = max(disp[a] * adv, 1e-6)
            inv_s = 1.0 / s_idx
            for t in range(m):
                th = az0[a] + t * step
                ct = math.cos(th)
                st = math.sin(th)
                xd = r * ct
                yd = r * st
                vlos = vsys[a] + sin_i[a] * (vrot[a] * ct + vexp[a] * st)
                uc = (vlos - u0) * inv_dv
                du = cu_cos[a] * ct + cu_sin[a] * st
                ds = c_s[a]
                j_lo = max(c0, int(math.floor(uc - _NSIG * s_idx - 1.0)))
                j_hi = min(c1, int(math.ceil(uc + _NSIG * s_idx + 1.0)) + 1)
                if j_lo >= j_hi:
                    continue
                for iz in range(nz):
                    px, py = _to_pixel(xd, yd, z_nodes[iz], cos_i[a], sin_i[a], sin_pa[a],
                                       cos_pa[a], x0[a] + off_x, y0[a] + off_y, jinv)
                    ix = int(math.floor(px))
                    iy = int(math.floor(py))
                    if ix < -1 or iy < -1 or ix >= nx or iy >= ny:
                        continue
                    fx = px - ix
                    fy = py - iy
                    wz = w_a * z_weights[iz]
                    w00 = wz * (1.0 - fx) * (1.0 - fy)
                    w01 = wz * fx * (1.0 - fy)
                    w10 = wz * (1.0 - fx) * fy
                    w11 = wz * fx * fy
                    ea = (j_lo - 0.5 - uc) * inv_s
                    pa_ = math.exp(-0.5 * ea * ea) * _INV_SQRT2PI
                    for j in range(j_lo, j_hi):
                        if tophat:
                            eb = (j + 0.5 - uc) * inv_s
                            pb = math.exp(-0.5 * eb * eb) * _INV_SQRT2PI
                            gu = (pa_ - pb) * inv_s
                            gs = (ea * pa_ - eb * pb) * inv_s
                            ea = eb
                            pa_ = pb
                        else:
                            q = (j - uc) * inv_s
                            ph = math.exp(-0.5 * q * q) * _INV_SQRT2PI
                            gu = ph * q * inv_s * inv_s
                            gs = ph * (q * q - 1.0) * inv_s * inv_s
                        fu = gu * du
                        fs = gs * ds
                        if iy >= 0:
                            if ix >= 0:
                                out_u[j, iy, ix] += w00 * fu
                                out_s[j, iy, ix] += w00 * fs
                            if ix + 1 < nx:
                                out_u[j, iy, ix + 1] += w01 * fu
                                out_s[j, iy, ix + 1] += w01 * fs
                        if iy + 1 < ny:
                            if ix >= 0:
                                out_u[j, iy + 1, ix] += w10 * fu
                                out_s[j, iy + 1, ix] += w10 * fs
                            if ix + 1 < nx:
                                out_u[j, iy + 1, ix + 1] += w11 * fu
                                out_s[j, iy + 1, ix + 1] += w11 * fs


@nb.njit(cache=True)
def deposit_surface(out, a_lo, a_hi, r_mid, n_az, az0, weight, x0, y0, sin_pa, cos_pa, sin_i,
                    cos_i, z_nodes, z_weights, jinv, off_x, off_y):
    """The velocity-integrated counterpart of :func:`deposit` into a 2D map (moment 0)."""
    ny, nx = out.shape
    for a in range(a_lo, a_hi):
        w_a = weight[a]
        if w_a == 0.0:
            continue
        r = r_mid[a]
        m = n_az[a]
        step = 2.0 * math.pi / m
        for t in range(m):
            th = az0[a] + t * step
            xd = r * math.cos(th)
            yd = r * math.sin(th)
            for iz in range(z_nodes.size):
                px, py = _to_pixel(xd, yd, z_nodes[iz], cos_i[a], sin_i[a], sin_pa[a],
                                   cos_pa[a], x0[a] + off_x, y0[a] + off_y, jinv)
                ix = int(math.floor(px))
                iy = int(math.floor(py))
                if ix < -1 or iy < -1 or ix >= nx or iy >= ny:
                    continue
                fx = px - ix
                fy = py - iy
                wz = w_a * z_weights[iz]
                if iy >= 0:
                    if ix >= 0:
                        out[iy, ix] += wz * (1.0 - fx) * (1.0 - fy)
                    if ix + 1 < nx:
                        out[iy, ix + 1] += wz * fx * (1.0 - fy)
                if iy + 1 < ny:
                    if ix >= 0:
                        out[iy + 1, ix] += wz * (1.0 - fx) * fy
                    if ix + 1 < nx:
                        out[iy + 1, ix + 1] += wz * fx * fy


def empty_cube(shape):
    return np.zeros(shape, dtype=np.float64)
