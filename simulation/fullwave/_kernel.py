"""Compiled inner loop of the full-wave solver (numba, one core, no threads).

Velocity-stress leapfrog on the staggered grid of Virieux (1986, Geophysics 51, 889),
second order in space and time, with the material averaging of the elastodynamic finite
integration technique (Fellinger et al. 1995, Wave Motion 21, 47) baked into the
coefficient arrays (see :mod:`.model`). Arrays are ``[nz, nx]``, x (the path) contiguous.

Node layout, cell (j, i) centred at ((i + 1/2) h, (j + 1/2) h):

``sxx, szz [j, i]``  cell centre
``vx [j, i]``        face between cells (j, i) and (j, i + 1),  x = (i + 1) h
``vz [j, i]``        face between cells (j, i) and (j + 1, i),  z = (j + 1) h
``sxz [j, i]``       corner shared by cells (j..j+1, i..i+1)

Coefficients are pre-multiplied by dt / h (buoyancy ``bx, bz``; stiffness ``l2m`` =
lambda + 2 mu, ``lam``; corner shear modulus ``mu``), so an update is a sum of
neighbour differences times one coefficient. A zero coefficient freezes the node at
zero: that is how void cells (outside the metal) make stress-free surfaces.

Absorbing ends (:mod:`.grid`): in the ``npml`` columns at each x-end every difference
``dF`` (along x and along z) is replaced by ``dF + psi`` with the recursive convolution
``psi <- b psi + a dF`` (Komatitsch and Martin 2007, Geophysics 72, SM155, eqs. 9-11,
kappa = 1); the z-differences use the x-profile scaled down (multiaxial PML,
Meza-Fajardo and Papageorgiou 2008, Bull. Seismol. Soc. Am. 98, 1811), which keeps the
layer stable in a plate. Memory variables live in ``[nz, 2 npml]`` arrays, left block first.

One time step n (force f at t_n = n dt, velocities at t_{n+1/2}); rows are swept once
with the stress update lagging the velocity update by one row:

1. v^{n+1/2} = v^{n-1/2} + b (D sigma^n) + b f^n
2. sigma^{n+1} = sigma^n + C (D' v^{n+1/2})
3. receivers record v^{n+1/2}

Every inner loop runs over 1-D row slices from 0 and writes one array: the form in which
LLVM vectorises them (a loop from a run-time start, or one writing several arrays read
through many others, stays scalar; measured with numba 0.68).
"""
from __future__ import annotations

from numba import njit

__all__ = ["advance"]

_JIT = dict(cache=True, fastmath=False, nogil=True, boundscheck=False)


@njit(**_JIT)
def _velocity_row(vx, vz, sxx, szz, sxz, bx, bz, j, i0, i1):
    m = i1 - i0
    a = vx[j, i0:i1]
    b = bx[j, i0:i1]
    s0 = sxx[j, i0:i1]
    s1 = sxx[j, i0 + 1:i1 + 1]
    t0 = sxz[j, i0:i1]
    tm = sxz[j - 1, i0:i1]
    for i in range(m):
        a[i] += b[i] * (s1[i] - s0[i] + t0[i] - tm[i])
    a = vz[j, i0:i1]
    b = bz[j, i0:i1]
    tl = sxz[j, i0 - 1:i1 - 1]
    z1 = szz[j + 1, i0:i1]
    z0 = szz[j, i0:i1]
    for i in range(m):
        a[i] += b[i] * (t0[i] - tl[i] + z1[i] - z0[i])


@njit(**_JIT)
def _stress_row(vx, vz, sxx, szz, sxz, l2m, lam, mu, j, i0, i1):
    m = i1 - i0
    x0 = vx[j, i0:i1]
    xl = vx[j, i0 - 1:i1 - 1]
    z0 = vz[j, i0:i1]
    zm = vz[j - 1, i0:i1]
    a = sxx[j, i0:i1]
    c = szz[j, i0:i1]
    p = l2m[j, i0:i1]
    q = lam[j, i0:i1]
    for i in range(m):
        ex = x0[i] - xl[i]
        ez = z0[i] - zm[i]
        a[i] += p[i] * ex + q[i] * ez
        c[i] += q[i] * ex + p[i] * ez
    a = sxz[j, i0:i1]
    u = mu[j, i0:i1]
    xp = vx[j + 1, i0:i1]
    zr = vz[j, i0 + 1:i1 + 1]
    for i in range(m):
        a[i] += u[i] * (xp[i] - x0[i] + zr[i] - z0[i])


@njit(**_JIT)
def _recurse(psi, bb, aa, f1, f0, m):
    """psi <- b psi + a (f1 - f0), elementwise over m entries."""
    for i in range(m):
        psi[i] = bb[i] * psi[i] + aa[i] * (f1[i] - f0[i])


@njit(**_JIT)
def _apply(a, c, f1, f0, pf, g1, g0, pg, m):
    """a <- a + c ((f1 - f0 + pf) + (g1 - g0 + pg)): one update with both stretched differences."""
    for i in range(m):
        a[i] += c[i] * (f1[i] - f0[i] + pf[i] + g1[i] - g0[i] + pg[i])


@njit(**_JIT)
def _psi_rows(psi, first, j, k0, m):
    """Row j of the x-memory arrays first, first + 1 and the z-memory arrays first + 4, first + 5."""
    return (psi[first][j, k0:k0 + m], psi[first + 1][j, k0:k0 + m], psi[first + 4][j, k0:k0 + m],
            psi[first + 5][j, k0:k0 + m])


@njit(**_JIT)
def _pml_columns(pml, i0, i1):
    return (pml[0][i0:i1], pml[1][i0:i1], pml[2][i0:i1], pml[3][i0:i1], pml[4][i0:i1], pml[5][i0:i1],
            pml[6][i0:i1], pml[7][i0:i1])


@njit(**_JIT)
def _velocity_pml_row(vx, vz, sxx, szz, sxz, bx, bz, psi, pml, j, i0, i1, k0):
    m = i1 - i0
    if m <= 0:
        return
    p1, p2, p3, p4 = _psi_rows(psi, 0, j, k0, m)
    ah, bh, ac, bc, azh, bzh, azc, bzc = _pml_columns(pml, i0, i1)
    s0 = sxx[j, i0:i1]
    s1 = sxx[j, i0 + 1:i1 + 1]
    t0 = sxz[j, i0:i1]
    tm = sxz[j - 1, i0:i1]
    tl = sxz[j, i0 - 1:i1 - 1]
    z1 = szz[j + 1, i0:i1]
    z0 = szz[j, i0:i1]
    _recurse(p1, bh, ah, s1, s0, m)
    _recurse(p3, bzh, azh, t0, tm, m)
    _apply(vx[j, i0:i1], bx[j, i0:i1], s1, s0, p1, t0, tm, p3, m)
    _recurse(p2, bc, ac, t0, tl, m)
    _recurse(p4, bzc, azc, z1, z0, m)
    _apply(vz[j, i0:i1], bz[j, i0:i1], t0, tl, p2, z1, z0, p4, m)


@njit(**_JIT)
def _stress_pml_row(vx, vz, sxx, szz, sxz, l2m, lam, mu, psi, pml, j, i0, i1, k0):
    m = i1 - i0
    if m <= 0:
        return
    p1, p2, p3, p4 = _psi_rows(psi, 2, j, k0, m)
    ah, bh, ac, bc, azh, bzh, azc, bzc = _pml_columns(pml, i0, i1)
    x0 = vx[j, i0:i1]
    xl = vx[j, i0 - 1:i1 - 1]
    xp = vx[j + 1, i0:i1]
    z0 = vz[j, i0:i1]
    zm = vz[j - 1, i0:i1]
    zr = vz[j, i0 + 1:i1 + 1]
    _recurse(p1, bc, ac, x0, xl, m)
    _recurse(p3, bzc, azc, z0, zm, m)
    a = sxx[j, i0:i1]
    c = szz[j, i0:i1]
    p = l2m[j, i0:i1]
    q = lam[j, i0:i1]
    for i in range(m):
        a[i] += p[i] * (x0[i] - xl[i] + p1[i]) + q[i] * (z0[i] - zm[i] + p3[i])
    for i in range(m):
        c[i] += q[i] * (x0[i] - xl[i] + p1[i]) + p[i] * (z0[i] - zm[i] + p3[i])
    _recurse(p2, bh, ah, zr, z0, m)
    _recurse(p4, bzh, azh, xp, x0, m)
    _apply(sxz[j, i0:i1], mu[j, i0:i1], xp, x0, p4, zr, z0, p2, m)


@njit(**_JIT)
def _inject(vx, vz, bx, bz, src_node, src_w, qn, j):
    for k in range(src_node.shape[0]):
        if src_node[k, 1] != j:
            continue
        i = src_node[k, 2]
        if src_node[k, 0] == 0:
            vx[j, i] += bx[j, i] * src_w[k] * qn
        else:
            vz[j, i] += bz[j, i] * src_w[k] * qn


@njit(**_JIT)
def advance(fields, coeffs, psi, pml, npml, src_node, src_w, q, rec_node, rec_w, rec_ch, out, n0, n_steps):
    """Advance ``n_steps`` steps from step ``n0`` (state in place).

    fields = (vx, vz, sxx, szz, sxz); coeffs = (bx, bz, l2m, lam, mu); psi = 8 memory
    arrays ``[nz, 2 npml]`` (x-differences of sxx, sxz, vx, vz; z-differences of sxz, szz,
    vz, vx); pml = (a, b) of the x-profile at faces and centres, then of the z-profile, per
    column. Source: rows of ``src_node`` are (component 0 = vx / 1 = vz, j, i); at step n node
    k gets ``v += b * src_w[k] * q[n]`` (``src_w * q`` is a traction on the node's cell face
    [Pa]; no source once ``n >= len(q)``). Receivers: channel ``rec_ch[k]`` accumulates
    ``rec_w[k] * v`` (v at t_{n+1/2}) into ``out[channel, n - n0]``.
    """
    vx, vz, sxx, szz, sxz = fields
    bx, bz, l2m, lam, mu = coeffs
    nz, nx = vx.shape
    nq = q.shape[0]
    lo = max(npml, 1)
    hi = nx - lo
    for n in range(n0, n0 + n_steps):
        qn = q[min(n, nq - 1)]
        # rows fused with a lag of one: velocity row j needs the stresses of rows j - 1 .. j + 1 at
        # step n; stress row j - 1 needs the velocities of rows j - 2 .. j at n + 1/2
        for j in range(1, nz):
            if j < nz - 1:
                _velocity_pml_row(vx, vz, sxx, szz, sxz, bx, bz, psi, pml, j, 1, npml, 1)
                _velocity_row(vx, vz, sxx, szz, sxz, bx, bz, j, lo, hi)
                _velocity_pml_row(vx, vz, sxx, szz, sxz, bx, bz, psi, pml, j, nx - npml, nx - 1, npml)
                if n < nq:
                    _inject(vx, vz, bx, bz, src_node, src_w, qn, j)
            if j >= 2:
                r = j - 1
                _stress_pml_row(vx, vz, sxx, szz, sxz, l2m, lam, mu, psi, pml, r, 1, npml, 1)
                _stress_row(vx, vz, sxx, szz, sxz, l2m, lam, mu, r, lo, hi)
                _stress_pml_row(vx, vz, sxx, szz, sxz, l2m, lam, mu, psi, pml, r, nx - npml, nx - 1, npml)
        for k in range(rec_node.shape[0]):
            c, j, i = rec_node[k, 0], rec_node[k, 1], rec_node[k, 2]
            if c == 0:
                out[rec_ch[k], n - n0] += rec_w[k] * vx[j, i]
            else:
                out[rec_ch[k], n - n0] += rec_w[k] * vz[j, i]
