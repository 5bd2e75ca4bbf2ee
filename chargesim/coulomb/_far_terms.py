"""Far-field loops of the tree evaluator, generated: do not edit.

Made by ``python -m chargesim.coulomb._multipoles`` from the formulas in
:mod:`chargesim.coulomb._multipoles` (expansion order 5). Each loop
sums, over the far nodes of a buffer ``fb`` (rows: centre x, y, z, then the
stored moments W of orders 0..5, one column per node), the field and
potential of some orders at one point, vectorised across nodes.
"""
import numba
import numpy as np

ORDER = 5
#: Rows of a far-node buffer: the centre and the stored moments.
ROWS = 59

# fast-math without no-NaN/no-inf, as in the direct sum
_FM = {"nsz", "arcp", "contract", "afn", "reassoc"}


@numba.njit(inline="always", fastmath=_FM, error_model="numpy")
def _far_012(gx, gy, gz, gi, fb, nf):
    """Order(s) 0, 1, 2 of the far nodes in ``fb`` (geometry in gx..gi)."""
    # one 1-D view per row: unit-stride loads, so the loop vectorises
    w000 = fb[3]
    w100 = fb[4]
    w010 = fb[5]
    w001 = fb[6]
    w200 = fb[7]
    w110 = fb[8]
    w101 = fb[9]
    w020 = fb[10]
    w011 = fb[11]
    w002 = fb[12]
    ax = 0.0
    ay = 0.0
    az = 0.0
    p = 0.0
    for f in range(nf):
        rx = gx[f]
        ry = gy[f]
        rz = gz[f]
        inv = gi[f]
        inv2 = inv * inv
        m100 = rx
        m010 = ry
        m001 = rz
        ip1 = inv
        ip3 = ip1 * inv2
        ip5 = ip3 * inv2
        ip7 = ip5 * inv2
        q0 = w000[f]
        g = q0 * ip3
        ax += g * rx
        ay += g * ry
        az += g * rz
        p += q0 * ip1
        vx = w100[f]
        vy = w010[f]
        vz = w001[f]
        s = rx * vx + ry * vy + rz * vz
        g = 3.0 * s * ip5
        h = 1.0 * ip3
        ax += g * rx - h * vx
        ay += g * ry - h * vy
        az += g * rz - h * vz
        p += s * ip3
        vx = 2.0 * w200[f] * m100 + w110[f] * m010 + w101[f] * m001
        vy = w110[f] * m100 + 2.0 * w020[f] * m010 + w011[f] * m001
        vz = w101[f] * m100 + w011[f] * m010 + 2.0 * w002[f] * m001
        s = rx * vx + ry * vy + rz * vz
        g = 5.0 * s * ip7
        h = 2.0 * ip5
        ax += g * rx - h * vx
        ay += g * ry - h * vy
        az += g * rz - h * vz
        p += s * ip5
    return ax, ay, az, p


@numba.njit(inline="always", fastmath=_FM, error_model="numpy")
def _far_3(gx, gy, gz, gi, fb, nf):
    """Order(s) 3 of the far nodes in ``fb`` (geometry in gx..gi)."""
    # one 1-D view per row: unit-stride loads, so the loop vectorises
    w300 = fb[13]
    w210 = fb[14]
    w201 = fb[15]
    w120 = fb[16]
    w111 = fb[17]
    w102 = fb[18]
    w030 = fb[19]
    w021 = fb[20]
    w012 = fb[21]
    w003 = fb[22]
    ax = 0.0
    ay = 0.0
    az = 0.0
    p = 0.0
    for f in range(nf):
        rx = gx[f]
        ry = gy[f]
        rz = gz[f]
        inv = gi[f]
        inv2 = inv * inv
        m100 = rx
        m010 = ry
        m001 = rz
        m200 = m100 * rx
        m110 = m010 * rx
        m101 = m001 * rx
        m020 = m010 * ry
        m011 = m001 * ry
        m002 = m001 * rz
        ip1 = inv
        ip3 = ip1 * inv2
        ip5 = ip3 * inv2
        ip7 = ip5 * inv2
        ip9 = ip7 * inv2
        vx = 3.0 * w300[f] * m200 + 2.0 * w210[f] * m110 + 2.0 * w201[f] * m101 + w120[f] * m020 + w111[f] * m011 + w102[f] * m002
        vy = w210[f] * m200 + 2.0 * w120[f] * m110 + w111[f] * m101 + 3.0 * w030[f] * m020 + 2.0 * w021[f] * m011 + w012[f] * m002
        vz = w201[f] * m200 + w111[f] * m110 + 2.0 * w102[f] * m101 + w021[f] * m020 + 2.0 * w012[f] * m011 + 3.0 * w003[f] * m002
        s = rx * vx + ry * vy + rz * vz
        g = 7.0 * s * ip9
        h = 3.0 * ip7
        ax += g * rx - h * vx
        ay += g * ry - h * vy
        az += g * rz - h * vz
        p += s * ip7
    return ax, ay, az, p


@numba.njit(inline="always", fastmath=_FM, error_model="numpy")
def _far_4(gx, gy, gz, gi, fb, nf):
    """Order(s) 4 of the far nodes in ``fb`` (geometry in gx..gi)."""
    # one 1-D view per row: unit-stride loads, so the loop vectorises
    w400 = fb[23]
    w310 = fb[24]
    w301 = fb[25]
    w220 = fb[26]
    w211 = fb[27]
    w202 = fb[28]
    w130 = fb[29]
    w121 = fb[30]
    w112 = fb[31]
    w103 = fb[32]
    w040 = fb[33]
    w031 = fb[34]
    w022 = fb[35]
    w013 = fb[36]
    w004 = fb[37]
    ax = 0.0
    ay = 0.0
    az = 0.0
    p = 0.0
    for f in range(nf):
        rx = gx[f]
        ry = gy[f]
        rz = gz[f]
        inv = gi[f]
        inv2 = inv * inv
        m100 = rx
        m010 = ry
        m001 = rz
        m200 = m100 * rx
        m110 = m010 * rx
        m101 = m001 * rx
        m020 = m010 * ry
        m011 = m001 * ry
        m002 = m001 * rz
        m300 = m200 * rx
        m210 = m110 * rx
        m201 = m101 * rx
        m120 = m020 * rx
        m111 = m011 * rx
        m102 = m002 * rx
        m030 = m020 * ry
        m021 = m011 * ry
        m012 = m002 * ry
        m003 = m002 * rz
        ip1 = inv
        ip3 = ip1 * inv2
        ip5 = ip3 * inv2
        ip7 = ip5 * inv2
        ip9 = ip7 * inv2
        ip11 = ip9 * inv2
        vx = 4.0 * w400[f] * m300 + 3.0 * w310[f] * m210 + 3.0 * w301[f] * m201 + 2.0 * w220[f] * m120 + 2.0 * w211[f] * m111 + 2.0 * w202[f] * m102 + w130[f] * m030 + w121[f] * m021 + w112[f] * m012 + w103[f] * m003
        vy = w310[f] * m300 + 2.0 * w220[f] * m210 + w211[f] * m201 + 3.0 * w130[f] * m120 + 2.0 * w121[f] * m111 + w112[f] * m102 + 4.0 * w040[f] * m030 + 3.0 * w031[f] * m021 + 2.0 * w022[f] * m012 + w013[f] * m003
        vz = w301[f] * m300 + w211[f] * m210 + 2.0 * w202[f] * m201 + w121[f] * m120 + 2.0 * w112[f] * m111 + 3.0 * w103[f] * m102 + w031[f] * m030 + 2.0 * w022[f] * m021 + 3.0 * w013[f] * m012 + 4.0 * w004[f] * m003
        s = rx * vx + ry * vy + rz * vz
        g = 9.0 * s * ip11
        h = 4.0 * ip9
        ax += g * rx - h * vx
        ay += g * ry - h * vy
        az += g * rz - h * vz
        p += s * ip9
    return ax, ay, az, p


@numba.njit(inline="always", fastmath=_FM, error_model="numpy")
def _far_5(gx, gy, gz, gi, fb, nf):
    """Order(s) 5 of the far nodes in ``fb`` (geometry in gx..gi)."""
    # one 1-D view per row: unit-stride loads, so the loop vectorises
    w500 = fb[38]
    w410 = fb[39]
    w401 = fb[40]
    w320 = fb[41]
    w311 = fb[42]
    w302 = fb[43]
    w230 = fb[44]
    w221 = fb[45]
    w212 = fb[46]
    w203 = fb[47]
    w140 = fb[48]
    w131 = fb[49]
    w122 = fb[50]
    w113 = fb[51]
    w104 = fb[52]
    w050 = fb[53]
    w041 = fb[54]
    w032 = fb[55]
    w023 = fb[56]
    w014 = fb[57]
    w005 = fb[58]
    ax = 0.0
    ay = 0.0
    az = 0.0
    p = 0.0
    for f in range(nf):
        rx = gx[f]
        ry = gy[f]
        rz = gz[f]
        inv = gi[f]
        inv2 = inv * inv
        m100 = rx
        m010 = ry
        m001 = rz
        m200 = m100 * rx
        m110 = m010 * rx
        m101 = m001 * rx
        m020 = m010 * ry
        m011 = m001 * ry
        m002 = m001 * rz
        m300 = m200 * rx
        m210 = m110 * rx
        m201 = m101 * rx
        m120 = m020 * rx
        m111 = m011 * rx
        m102 = m002 * rx
        m030 = m020 * ry
        m021 = m011 * ry
        m012 = m002 * ry
        m003 = m002 * rz
        m400 = m300 * rx
        m310 = m210 * rx
        m301 = m201 * rx
        m220 = m120 * rx
        m211 = m111 * rx
        m202 = m102 * rx
        m130 = m030 * rx
        m121 = m021 * rx
        m112 = m012 * rx
        m103 = m003 * rx
        m040 = m030 * ry
        m031 = m021 * ry
        m022 = m012 * ry
        m013 = m003 * ry
        m004 = m003 * rz
        ip1 = inv
        ip3 = ip1 * inv2
        ip5 = ip3 * inv2
        ip7 = ip5 * inv2
        ip9 = ip7 * inv2
        ip11 = ip9 * inv2
        ip13 = ip11 * inv2
        vx = 5.0 * w500[f] * m400 + 4.0 * w410[f] * m310 + 4.0 * w401[f] * m301 + 3.0 * w320[f] * m220 + 3.0 * w311[f] * m211 + 3.0 * w302[f] * m202 + 2.0 * w230[f] * m130 + 2.0 * w221[f] * m121 + 2.0 * w212[f] * m112 + 2.0 * w203[f] * m103 + w140[f] * m040 + w131[f] * m031 + w122[f] * m022 + w113[f] * m013 + w104[f] * m004
        vy = w410[f] * m400 + 2.0 * w320[f] * m310 + w311[f] * m301 + 3.0 * w230[f] * m220 + 2.0 * w221[f] * m211 + w212[f] * m202 + 4.0 * w140[f] * m130 + 3.0 * w131[f] * m121 + 2.0 * w122[f] * m112 + w113[f] * m103 + 5.0 * w050[f] * m040 + 4.0 * w041[f] * m031 + 3.0 * w032[f] * m022 + 2.0 * w023[f] * m013 + w014[f] * m004
        vz = w401[f] * m400 + w311[f] * m310 + 2.0 * w302[f] * m301 + w221[f] * m220 + 2.0 * w212[f] * m211 + 3.0 * w203[f] * m202 + w131[f] * m130 + 2.0 * w122[f] * m121 + 3.0 * w113[f] * m112 + 4.0 * w104[f] * m103 + w041[f] * m040 + 2.0 * w032[f] * m031 + 3.0 * w023[f] * m022 + 4.0 * w014[f] * m013 + 5.0 * w005[f] * m004
        s = rx * vx + ry * vy + rz * vz
        g = 11.0 * s * ip13
        h = 5.0 * ip11
        ax += g * rx - h * vx
        ay += g * ry - h * vy
        az += g * rz - h * vz
        p += s * ip11
    return ax, ay, az, p


@numba.njit(inline="always", fastmath=_FM, error_model="numpy")
def far_sum(xi, yi, zi, fb, nf, gx, gy, gz, gi):
    """Field sum (C/m^2) and potential sum (C/m) of the far nodes in ``fb`` at one point.

    gx, gy, gz, gi: scratch arrays of at least nf entries (the point minus each
    node's centre, and the inverse distance: one square root per node, shared
    by the loops of all orders).
    """
    cx = fb[0]
    cy = fb[1]
    cz = fb[2]
    for f in range(nf):
        rx = xi - cx[f]
        ry = yi - cy[f]
        rz = zi - cz[f]
        gx[f] = rx
        gy[f] = ry
        gz[f] = rz
        gi[f] = 1.0 / np.sqrt(rx * rx + ry * ry + rz * rz)
    ax, ay, az, p = _far_012(gx, gy, gz, gi, fb, nf)
    bx, by, bz, bp = _far_3(gx, gy, gz, gi, fb, nf)
    ax += bx
    ay += by
    az += bz
    p += bp
    bx, by, bz, bp = _far_4(gx, gy, gz, gi, fb, nf)
    ax += bx
    ay += by
    az += bz
    p += bp
    bx, by, bz, bp = _far_5(gx, gy, gz, gi, fb, nf)
    ax += bx
    ay += by
    az += bz
    p += bp
    return ax, ay, az, p
