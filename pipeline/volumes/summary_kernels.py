"""Compiled kernel of :meth:`SummaryAccumulator.update_shifted <pipeline.volumes.summary.
SummaryAccumulator.update_shifted>`: register, form neighbour means, add to the sums.

Hand-written (numba) because it replaces a float32 registered copy, a float64 copy, three
box-sum copies and five full-volume read-modify-write passes per volume. The first version
went plane by plane (117 -> 14 ms of CPU per 30 x 256 x 256 volume, measured on one core) but
still made eight passes over each plane (three for the trilinear shift, four for the
neighbour mean, one for the sums). This one goes row by row inside a plane: the z and y
interpolations of a row are formed together into a row buffer and the x interpolation reads
it (one pass writing the registered plane), and the neighbour box sums of a row are formed
from a rolling buffer of three z-summed rows and added to the four sums while the row is in
the L1 cache (one pass). Every value is computed with the operations, in the order, of
:func:`pipeline.volumes.motion.shift_volume` and :func:`pipeline.volumes.summary.
neighbour_mean`, so the sums stay bit-identical to those of a registered copy (tested).
Measured on the 30 x 256 x 256 benchmark volumes, float32 block sums, one core of the shared
2-core machine (best of 3): see ``DEVELOPERS.md`` ("Motion in three passes").
"""

from __future__ import annotations

import numba
import numpy as np

__all__ = ["accumulate", "add_shifted"]


@numba.njit(cache=True, nogil=True)
def _taps(n, k):  # pragma: no cover - compiled
    lo = np.empty(n, np.int64)
    hi = np.empty(n, np.int64)
    for i in range(n):
        lo[i] = min(max(i + k, 0), n - 1)
        hi[i] = min(max(i + k + 1, 0), n - 1)
    return lo, hi


@numba.njit(cache=True, nogil=True)
def _registered_plane(vol, z, zlo, zhi, fz, ylo, yhi, fy, xlo, xhi, fx, kx, exact, offset,
                      row, lerp, r0, r1, out):  # pragma: no cover - compiled
    """Rows ``r0..r1-1`` of plane z of ``shift_volume(vol, shift) - offset`` into ``out[0 :
    r1 - r0]`` (float64), row by row.

    The value at (y, x) is the z lerp of rows ``ylo[y]`` and ``yhi[y]``, then the y lerp,
    then the x lerp, each in float32 with the operation order of
    ``motion._separable_linear_shift`` (bit-identical to it); ``exact`` reads the values as
    float64 without any arithmetic (zero shift on a float input). ``kx`` is the whole-voxel x
    shift of the tables ``xlo``/``xhi``; ``row`` and ``lerp`` are float32 row buffers. The
    x lerp read through the tables for every voxel took 1.84 ms per 30 x 256 x 256 volume,
    as contiguous slices with the float64 difference in a loop of its own 1.01 ms (measured,
    one core, best of 9; bit-identical)."""
    nx = out.shape[1]
    if exact:
        for y in range(r0, r1):
            for x in range(nx):
                out[y - r0, x] = np.float64(vol[z, y, x]) - np.float64(offset[z, y, x])
        return
    xa = min(max(0, -kx), nx)
    xb = max(min(nx, nx - 1 - kx), xa)
    one = np.float32(1.0)
    wz = one - fz
    wy = one - fy
    wx = one - fx
    p0 = zlo[z]
    p1 = zhi[z]
    for y in range(r0, r1):
        q0 = ylo[y]
        q1 = yhi[y]
        if fz != 0 and fy != 0:
            for x in range(nx):
                a0 = np.float32(vol[p0, q0, x]) * wz + np.float32(vol[p1, q0, x]) * fz
                a1 = np.float32(vol[p0, q1, x]) * wz + np.float32(vol[p1, q1, x]) * fz
                row[x] = a0 * wy + a1 * fy
        elif fz != 0:
            for x in range(nx):
                row[x] = np.float32(vol[p0, q0, x]) * wz + np.float32(vol[p1, q0, x]) * fz
        elif fy != 0:
            for x in range(nx):
                row[x] = np.float32(vol[p0, q0, x]) * wy + np.float32(vol[p0, q1, x]) * fy
        else:
            for x in range(nx):
                row[x] = np.float32(vol[p0, q0, x])
        # the x lerp into a second float32 row, as contiguous slices where neither tap is
        # clipped (x in [xa, xb): xlo[x] = x + kx, xhi[x] = x + kx + 1) and through the
        # tables at the edges, then the float64 difference in its own loop
        if fx != 0:
            for x in range(xa):
                lerp[x] = row[xlo[x]] * wx + row[xhi[x]] * fx
            src = row[xa + kx: xb + kx + 1]
            dst = lerp[xa:xb]
            for i in range(xb - xa):
                dst[i] = src[i] * wx + src[i + 1] * fx
            for x in range(xb, nx):
                lerp[x] = row[xlo[x]] * wx + row[xhi[x]] * fx
        else:
            for x in range(nx):
                lerp[x] = row[xlo[x]]
        o = out[y - r0]
        off = offset[z, y]
        for x in range(nx):
            o[x] = np.float64(lerp[x]) - np.float64(off[x])


@numba.njit(cache=True, nogil=True)
def _zrow(cur, up, dn, has_up, has_dn, mode, y, out):  # pragma: no cover - compiled
    """Row y of the z box sum (``cur + up + dn`` in that order; ``cur`` alone for mode 8)."""
    nx = cur.shape[1]
    if mode == 0 and has_up and has_dn:
        for x in range(nx):
            out[x] = (cur[y, x] + up[y, x]) + dn[y, x]
    elif mode == 0 and has_up:
        for x in range(nx):
            out[x] = cur[y, x] + up[y, x]
    elif mode == 0 and has_dn:
        for x in range(nx):
            out[x] = cur[y, x] + dn[y, x]
    else:
        for x in range(nx):
            out[x] = cur[y, x]


@numba.njit(cache=True, nogil=True)
def _add_row(cur_row, m_row, sx, sxx, sxn, snn):  # pragma: no cover - compiled
    for x in range(cur_row.shape[0]):
        v = cur_row[x]
        m = m_row[x]
        sx[x] += v
        sxx[x] += v * v
        sxn[x] += v * m
        snn[x] += m * m


@numba.njit(cache=True, nogil=True)
def _plane_sums(cur, up, dn, has_up, has_dn, mode, y0, y1, r0, ny, zs, ybox, mrow, sx, sxx, sxn,
                snn):  # pragma: no cover - compiled
    """Neighbour means of rows ``y0..y1-1`` of plane ``cur`` (``up`` = z + 1, ``dn`` =
    z - 1; these hold the plane's rows from ``r0`` on, which must cover ``y0 - 1 .. y1`` as
    far as the plane's ``ny`` rows go), row by row, added with the rows' values to the four
    sums (whole planes); box sums in the order of ``neighbour_mean`` (z, then y, then x,
    then minus the centre, over the count of neighbours present)."""
    nx = cur.shape[1]
    if mode == 1:  # 6 face neighbours
        for y in range(y0, y1):
            ly = y - r0
            for x in range(nx):
                t = 0.0
                c = 0.0
                if has_up:
                    t = t + up[ly, x]
                    c += 1.0
                if has_dn:
                    t = t + dn[ly, x]
                    c += 1.0
                if y + 1 < ny:
                    t = t + cur[ly + 1, x]
                    c += 1.0
                if y > 0:
                    t = t + cur[ly - 1, x]
                    c += 1.0
                if x + 1 < nx:
                    t = t + cur[ly, x + 1]
                    c += 1.0
                if x > 0:
                    t = t + cur[ly, x - 1]
                    c += 1.0
                mrow[x] = t / c if c > 0 else 0.0
            _add_row(cur[ly], mrow, sx[y], sxx[y], sxn[y], snn[y])
        return
    cz = 1.0 + has_up + has_dn if mode == 0 else 1.0
    if y0 > 0:
        _zrow(cur, up, dn, has_up, has_dn, mode, y0 - 1 - r0, zs[(y0 - 1) % 3])
    _zrow(cur, up, dn, has_up, has_dn, mode, y0 - r0, zs[y0 % 3])
    for y in range(y0, y1):
        if y + 1 < ny:
            _zrow(cur, up, dn, has_up, has_dn, mode, y + 1 - r0, zs[(y + 1) % 3])
        a = zs[y % 3]
        if y + 1 < ny and y > 0:
            b = zs[(y + 1) % 3]
            d = zs[(y - 1) % 3]
            for x in range(nx):
                ybox[x] = (a[x] + b[x]) + d[x]
        elif y + 1 < ny:
            b = zs[(y + 1) % 3]
            for x in range(nx):
                ybox[x] = a[x] + b[x]
        elif y > 0:
            d = zs[(y - 1) % 3]
            for x in range(nx):
                ybox[x] = a[x] + d[x]
        else:
            ybox[:] = a
        cy = 1.0 + (y > 0) + (y + 1 < ny) if ny > 1 else 1.0
        c_row = cur[y - r0]
        if nx >= 3:
            c_in = cz * cy * 3.0 - 1.0
            if c_in > 0:
                # times the reciprocal, as neighbour_mean does: a division per voxel kept
                # the loop on the divider
                rinv = 1.0 / c_in
                for x in range(1, nx - 1):
                    t = (ybox[x] + ybox[x + 1]) + ybox[x - 1]
                    mrow[x] = (t - c_row[x]) * rinv
            else:
                mrow[1:nx - 1] = 0.0
        for x in (0, nx - 1):
            t = ybox[x]
            if x + 1 < nx:
                t = t + ybox[x + 1]
            if x > 0:
                t = t + ybox[x - 1]
            cx = 1.0 + (x > 0) + (x + 1 < nx) if nx > 1 else 1.0
            c = cz * cy * cx - 1.0
            mrow[x] = (t - c_row[x]) * (1.0 / c) if c > 0 else 0.0
        _add_row(c_row, mrow, sx[y], sxx[y], sxn[y], snn[y])


@numba.njit(cache=True, nogil=True)
def accumulate(vols, shift_i, shift_f, offset, exact, mode, s_x, s_xx, s_xn, s_nn,
               band=0):  # pragma: no cover - compiled
    """Add volumes ``vols[b]``, each registered by its shift and offset, to the running sums.

    Band of rows by band of rows, then plane by plane: for each volume the band's rows (and
    one more row each side) of the registered plane ahead are built into its ring of three
    float64 planes, and the neighbour means and sums of the current plane's band are formed
    row by row (each voxel receives the volumes in order). ``mode``: 0 = 26 neighbours, 1 =
    6, 2 = 8 in-plane; ``exact``: no shift (the volumes are read as they are); ``band``: rows
    per band (0: chosen from the plane's width, see below).

    The bands keep the ring in the L2 cache: whole planes (three float64 planes of 256 x 256,
    1.5 MB, next to the 1 MB of the four float32 sums' plane) went to the next cache level.
    Measured on 30 x 256 x 256 uint16 volumes (one core, best of 5, the same bits): 5.5-5.9
    ms per volume with whole planes, 4.6 ms with bands of ~100 rows (50 and 200 rows: 4.6-4.9
    ms). Passing several volumes per call (the sums' rows then stay in cache across them)
    gained nothing: 4.5, 4.7, 4.7, 4.8 ms per volume for 1, 2, 4, 8 volumes per call.
    """
    nb, nz, ny, nx = vols.shape
    taps = np.empty((nb, 6, max(nz, ny, nx)), np.int64)
    for i in range(nb):
        lo, hi = _taps(nz, shift_i[i, 0])
        taps[i, 0, :nz] = lo
        taps[i, 1, :nz] = hi
        lo, hi = _taps(ny, shift_i[i, 1])
        taps[i, 2, :ny] = lo
        taps[i, 3, :ny] = hi
        lo, hi = _taps(nx, shift_i[i, 2])
        taps[i, 4, :nx] = lo
        taps[i, 5, :nx] = hi
    # rows per band: the band's ring rows of every volume (3 planes, float64) and the band of
    # the four sums stay within ~1 MB (the L2 cache of the machine measured has 2 MB)
    if band <= 0:
        band = max(4, min(ny, (1 << 20) // (nx * (24 * nb + 16)) - 2))
    band = min(band, ny)
    ring = np.empty((nb, 3, min(ny, band + 2), nx), np.float64)
    row = np.empty(nx, np.float32)
    lerp = np.empty(nx, np.float32)
    zs = np.empty((3, nx), np.float64)
    ybox = np.empty(nx, np.float64)
    mrow = np.empty(nx, np.float64)
    for y0 in range(0, ny, band):
        y1 = min(ny, y0 + band)
        r0 = max(0, y0 - 1)                    # rows y0 - 1 .. y1 of each plane are needed
        r1 = min(ny, y1 + 1)
        for i in range(nb):
            t = taps[i]
            _registered_plane(vols[i], 0, t[0], t[1], shift_f[i, 0], t[2], t[3],
                              shift_f[i, 1], t[4], t[5], shift_f[i, 2], shift_i[i, 2], exact,
                              offset, row, lerp, r0, r1, ring[i, 0])
        for z in range(nz):
            for i in range(nb):
                r = ring[i]
                if z + 1 < nz:
                    t = taps[i]
                    _registered_plane(vols[i], z + 1, t[0], t[1], shift_f[i, 0], t[2], t[3],
                                      shift_f[i, 1], t[4], t[5], shift_f[i, 2], shift_i[i, 2],
                                      exact, offset, row, lerp, r0, r1, r[(z + 1) % 3])
                _plane_sums(r[z % 3], r[(z + 1) % 3], r[(z + 2) % 3], z + 1 < nz, z > 0, mode,
                            y0, y1, r0, ny, zs, ybox, mrow, s_x[z], s_xx[z], s_xn[z], s_nn[z])


@numba.njit(cache=True, nogil=True)
def add_shifted(vol, shift_i, shift_f, offset, total):  # pragma: no cover - compiled
    """``total += shift_volume(vol, shift) - offset`` plane by plane, without the copy.

    The reference passes of the motion stage sum registered volumes; the separable shift
    makes a float32 copy in three gathers before the float64 addition: 13.5 ms of CPU per
    30 x 256 x 256 uint16 volume against 3.0 ms for this loop a plane at a time (measured,
    one core; bit-identical, tested)."""
    nz, ny, nx = vol.shape
    zlo, zhi = _taps(nz, shift_i[0])
    ylo, yhi = _taps(ny, shift_i[1])
    xlo, xhi = _taps(nx, shift_i[2])
    row = np.empty(nx, np.float32)
    lerp = np.empty(nx, np.float32)
    plane = np.empty((ny, nx), np.float64)
    for z in range(nz):
        _registered_plane(vol, z, zlo, zhi, shift_f[0], ylo, yhi, shift_f[1], xlo, xhi,
                          shift_f[2], shift_i[2], False, offset, row, lerp, 0, ny, plane)
        t = total[z]
        for y in range(ny):
            for x in range(nx):
                t[y, x] += plane[y, x]
