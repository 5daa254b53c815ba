"""Compiled kernels of :mod:`meshcheck.gradation` (cell sizes and size jumps across
faces), of cell centroids (:attr:`meshcheck.mesh.Mesh.centroids`) and of the boundary
surface's geometry in :mod:`meshcheck.curvature` (triangle normals, areas, corner
angles and enclosing radii, the angles between adjacent normals, the corner-weighted
vertex normals, the curvature fits); the numpy code there is the reference they are
tested against."""
from __future__ import annotations

import numpy as np

from . import njit


@njit
def _row_sum(length, ce, c):
    """Sum of length[ce[c, :]] in numpy's order for a contiguous row (``np.add.reduce``:
    one after the other below 8 terms, else 8 running sums combined pairwise, then the
    rest)."""
    w = ce.shape[1]
    if w < 8:
        s = 0.0
        for j in range(w):
            s += length[ce[c, j]]
        return s
    r0 = length[ce[c, 0]]
    r1 = length[ce[c, 1]]
    r2 = length[ce[c, 2]]
    r3 = length[ce[c, 3]]
    r4 = length[ce[c, 4]]
    r5 = length[ce[c, 5]]
    r6 = length[ce[c, 6]]
    r7 = length[ce[c, 7]]
    i = 8
    while i < w - w % 8:
        r0 += length[ce[c, i]]
        r1 += length[ce[c, i + 1]]
        r2 += length[ce[c, i + 2]]
        r3 += length[ce[c, i + 3]]
        r4 += length[ce[c, i + 4]]
        r5 += length[ce[c, i + 5]]
        r6 += length[ce[c, i + 6]]
        r7 += length[ce[c, i + 7]]
        i += 8
    s = ((r0 + r1) + (r2 + r3)) + ((r4 + r5) + (r6 + r7))
    while i < w:
        s += length[ce[c, i]]
        i += 1
    return s


@njit
def _corner_mean_row(points, cells, c, k, out, i):
    """out[i] = mean of the first k nodes of row c of ``cells``, summed corner by corner
    and divided by k (bitwise as ``mesh._corner_mean``)."""
    for d in range(3):
        s = points[cells[c, 0], d]
        for j in range(1, k):
            s += points[cells[c, j], d]
        out[i, d] = s / k


@njit
def corner_mean(points, cells, k, out):
    """out[c] = centroid (mean of the first k nodes) of every row c of ``cells`` (m, >= k),
    metres."""
    for c in range(cells.shape[0]):
        _corner_mean_row(points, cells, c, k, out, c)


@njit
def corner_mean_rows(points, cells, rows, k, out):
    """out[i] = centroid of row rows[i] of ``cells`` (:func:`corner_mean` of some rows)."""
    for i in range(rows.shape[0]):
        _corner_mean_row(points, cells, rows[i], k, out, i)


@njit
def mean_edge_length(ce, length, out):
    """out[c] = mean of length (n_e,) float64 over the edges ce (m, w) int64 of cell c
    (m), bitwise as ``length[ce].mean(axis=1)`` (w <= 128)."""
    w = ce.shape[1]
    for c in range(ce.shape[0]):
        out[c] = _row_sum(length, ce, c) / w


@njit
def _face_ratio(face_cells, size, f):
    """Size ratio across face f: larger / smaller size, inf when the smaller is not > 0,
    NaN when a size is not finite (as the numpy path)."""
    a = size[face_cells[f, 0]]
    b = size[face_cells[f, 1]]
    if not (np.isfinite(a) and np.isfinite(b)):
        return np.nan
    lo = min(a, b)
    hi = max(a, b)
    return hi / lo if lo > 0 else np.inf


#: faces over the ratio that :func:`face_jumps` keeps in one pass (more: a second pass)
_JUMPS_FIRST = 4096


@njit
def face_jumps(face_cells, count, size, ratio, f0, f1):
    """Size ratios across the faces f0 <= f < f1 of count 2: (number of such faces,
    largest finite ratio or -inf when none, face ids (k,) and ratios (k,) of those over
    ``ratio``, in face order).  The ratio is larger / smaller size, inf when the smaller
    is not > 0, NaN when a size is not finite (as the numpy path).

    The first :data:`_JUMPS_FIRST` faces over the ratio go to fixed buffers; when there
    are more, a second pass fills arrays of the exact size (no array is replaced inside
    the loop: numba would count its references at every step)."""
    ids = np.empty(_JUMPS_FIRST, np.int64)
    rs = np.empty(_JUMPS_FIRST)
    k = 0
    n_pairs = 0
    best = -np.inf
    for f in range(f0, f1):
        if count[f] != 2:
            continue
        n_pairs += 1
        r = _face_ratio(face_cells, size, f)
        if np.isfinite(r) and r > best:
            best = r
        if r > ratio:
            if k < _JUMPS_FIRST:
                ids[k] = f
                rs[k] = r
            k += 1
    if k <= _JUMPS_FIRST:
        return n_pairs, best, ids[:k].copy(), rs[:k].copy()
    all_ids = np.empty(k, np.int64)
    all_rs = np.empty(k)
    j = 0
    for f in range(f0, f1):
        if count[f] == 2:
            r = _face_ratio(face_cells, size, f)
            if r > ratio:
                all_ids[j] = f
                all_rs[j] = r
                j += 1
    return n_pairs, best, all_ids, all_rs


@njit(error_model="numpy")  # divisions by zero give inf / NaN, as numpy's
def fit_curvatures(points, tri, normals, corner, fn, k1, k2):
    """Principal curvatures k1 >= k2 of every triangle t (points[tri[t]]) by the
    least-squares fit of :func:`meshcheck.curvature._fit_curvatures`: the shape operator
    [[a, b], [b, c]] in the frame (u along side 0-1, v = fn x u) solving S e = dn over
    the three sides in the least-squares sense, dn the change of the corner normals
    normals[corner[t, i]]; the 3x3 normal equations by Gaussian elimination with partial
    pivoting (as LAPACK's gesv). NaN where the system is not finite or singular."""
    M = np.empty((3, 4))  # the normal equations [A^T A | A^T y], reused per triangle
    for t in range(tri.shape[0]):
        p0 = tri[t, 0]
        p1 = tri[t, 1]
        ux = points[p1, 0] - points[p0, 0]
        uy = points[p1, 1] - points[p0, 1]
        uz = points[p1, 2] - points[p0, 2]
        nu = np.sqrt(ux * ux + uy * uy + uz * uz)
        ux /= nu
        uy /= nu
        uz /= nu
        vx = fn[t, 1] * uz - fn[t, 2] * uy
        vy = fn[t, 2] * ux - fn[t, 0] * uz
        vz = fn[t, 0] * uy - fn[t, 1] * ux
        for q in range(3):
            for w in range(4):
                M[q, w] = 0.0
        for s in range(3):
            i = (s + 1) % 3
            j = (s + 2) % 3
            a = tri[t, i]
            b = tri[t, j]
            ex = points[b, 0] - points[a, 0]
            ey = points[b, 1] - points[a, 1]
            ez = points[b, 2] - points[a, 2]
            na = corner[t, i]
            nb = corner[t, j]
            dx = normals[nb, 0] - normals[na, 0]
            dy = normals[nb, 1] - normals[na, 1]
            dz = normals[nb, 2] - normals[na, 2]
            eu = ex * ux + ey * uy + ez * uz
            ev = ex * vx + ey * vy + ez * vz
            yu = dx * ux + dy * uy + dz * uz
            yv = dx * vx + dy * vy + dz * vz
            # rows (eu, ev, 0) -> yu and (0, eu, ev) -> yv
            M[0, 0] += eu * eu
            M[0, 1] += eu * ev
            M[1, 1] += ev * ev + eu * eu
            M[1, 2] += eu * ev
            M[2, 2] += ev * ev
            M[0, 3] += eu * yu
            M[1, 3] += ev * yu + eu * yv
            M[2, 3] += ev * yv
        M[1, 0] = M[0, 1]
        M[2, 1] = M[1, 2]
        ok = True
        for q in range(3):
            for w in range(4):
                if not np.isfinite(M[q, w]):
                    ok = False
        det = 1.0
        if ok:
            for col in range(3):
                piv = col
                for q in range(col + 1, 3):
                    if abs(M[q, col]) > abs(M[piv, col]):
                        piv = q
                if piv != col:
                    det = -det
                    for w in range(4):
                        tmp = M[col, w]
                        M[col, w] = M[piv, w]
                        M[piv, w] = tmp
                det *= M[col, col]
                if M[col, col] == 0.0:
                    break
                for q in range(col + 1, 3):
                    f = M[q, col] / M[col, col]
                    for w in range(col, 4):
                        M[q, w] -= f * M[col, w]
        if not ok or not abs(det) > 1e-300:
            k1[t] = np.nan
            k2[t] = np.nan
            continue
        c = M[2, 3] / M[2, 2]
        b = (M[1, 3] - M[1, 2] * c) / M[1, 1]
        a = (M[0, 3] - M[0, 1] * b - M[0, 2] * c) / M[0, 0]
        mean = 0.5 * (a + c)
        dev = np.sqrt(0.25 * (a - c) ** 2 + b * b)
        k1[t] = mean + dev
        k2[t] = mean - dev


# ---------------------------------------------------------------------------
# the boundary surface (meshcheck.curvature): per triangle, the operations of the numpy
# reference (trimesh 5.x's) one triangle at a time


_TOL_ZERO = 1e-13  # trimesh.util.TOL_ZERO: rows of norm at or below it are not unitized
_TOL_MERGE = 1e-8  # trimesh.constants.tol.merge: corner angles below it zero the triangle


@njit(inline="always")
def _unit(x, y, z):
    """trimesh.util.unitize of one row: (x, y, z) / |.| above 1e-13 (times the
    reciprocal), else times the norm; and whether it was above."""
    n = np.sqrt(x * x + y * y + z * z)
    if n > _TOL_ZERO:
        r = 1.0 / n
        return x * r, y * r, z * r, True
    return x * n, y * n, z * n, False


@njit(inline="always")
def _diff(points, i, j):
    """points[j] - points[i], componentwise."""
    return (points[j, 0] - points[i, 0], points[j, 1] - points[i, 1],
            points[j, 2] - points[i, 2])


@njit(inline="always")
def _cross(p0, p1, p2, q0, q1, q2):
    """p x q (np.cross's operations)."""
    return p1 * q2 - p2 * q1, p2 * q0 - p0 * q2, p0 * q1 - p1 * q0


@njit(inline="always")
def _acos(x):
    """np.arccos(np.clip(x, -1, 1)) (NaN stays NaN)."""
    if x < -1.0:
        x = -1.0
    elif x > 1.0:
        x = 1.0
    return np.arccos(x)


@njit(error_model="numpy")
def triangle_geometry(points, tri, fn, area, corner):
    """Unit normals fn (n_t, 3) (zero for degenerate triangles), areas (n_t,) m^2 and
    corner angles (n_t, 3) rad (all zero when one is below 1e-8) of the triangles
    points[tri[t]], as :func:`meshcheck.curvature._triangle_geometry` computes them."""
    for t in range(tri.shape[0]):
        a = tri[t, 0]
        b = tri[t, 1]
        c = tri[t, 2]
        # sides 0-1, 1-2 and their cross product
        p0, p1, p2 = _diff(points, a, b)
        q0, q1, q2 = _diff(points, b, c)
        x, y, z = _cross(p0, p1, p2, q0, q1, q2)
        nx, ny, nz, ok = _unit(x, y, z)
        if not ok:
            nx, ny, nz = 0.0, 0.0, 0.0
        fn[t, 0] = nx
        fn[t, 1] = ny
        fn[t, 2] = nz
        area[t] = np.sqrt(x * x + y * y + z * z) / 2.0
        ux, uy, uz, _ = _unit(p0, p1, p2)  # 0 -> 1
        r0, r1, r2 = _diff(points, a, c)
        vx, vy, vz, _ = _unit(r0, r1, r2)  # 0 -> 2
        wx, wy, wz, _ = _unit(q0, q1, q2)  # 1 -> 2
        a0 = _acos(ux * vx + uy * vy + uz * vz)
        a1 = _acos(-ux * wx + -uy * wy + -uz * wz)
        a2 = np.pi - a0 - a1
        if a0 < _TOL_MERGE or a1 < _TOL_MERGE or a2 < _TOL_MERGE:
            a0, a1, a2 = 0.0, 0.0, 0.0
        corner[t, 0] = a0
        corner[t, 1] = a1
        corner[t, 2] = a2


@njit
def normal_angles(fn, pairs, out):
    """out[i] = angle (rad) between the unit normals fn[pairs[i, 0]] and fn[pairs[i, 1]]
    (|np.arccos(np.clip(dot, -1, 1))|)."""
    for i in range(pairs.shape[0]):
        f = pairs[i, 0]
        g = pairs[i, 1]
        out[i] = abs(_acos(fn[f, 0] * fn[g, 0] + fn[f, 1] * fn[g, 1] + fn[f, 2] * fn[g, 2]))


@njit
def corner_normal_sums(rows, corner, fn, acc):
    """acc[rows[3 t + i]] += corner[t, i] * fn[t] for every triangle t and corner i, in
    that order (np.add.at's sums): the corner-angle-weighted normals of the (vertex,
    patch) rows."""
    for t in range(fn.shape[0]):
        for i in range(3):
            r = rows[3 * t + i]
            w = corner[t, i]
            for j in range(3):
                acc[r, j] += w * fn[t, j]


@njit(error_model="numpy")
def enclosing_radii(points, tri, out):
    """out[t] = radius (m) of the smallest circle enclosing triangle points[tri[t]], as
    :func:`meshcheck.curvature.enclosing_radius`: the circumradius a b c / (2 |cross|),
    or half the longest side when the triangle is obtuse or that is not finite."""
    for t in range(tri.shape[0]):
        i = tri[t, 0]
        j = tri[t, 1]
        k = tri[t, 2]
        x0, x1, x2 = _diff(points, j, k)
        a = np.sqrt(x0 * x0 + x1 * x1 + x2 * x2)
        y0, y1, y2 = _diff(points, k, i)
        b = np.sqrt(y0 * y0 + y1 * y1 + y2 * y2)
        p0, p1, p2 = _diff(points, i, j)
        c = np.sqrt(p0 * p0 + p1 * p1 + p2 * p2)
        lo = min(a, b)
        hi = max(a, b)
        mid = min(hi, c)
        top = max(hi, c)
        low = min(lo, mid)
        mid = max(lo, mid)
        q0, q1, q2 = _diff(points, i, k)
        z0, z1, z2 = _cross(p0, p1, p2, q0, q1, q2)
        area2 = np.sqrt(z0 * z0 + z1 * z1 + z2 * z2)
        rc = a * b * c / (2.0 * area2)
        if a != a or b != b or c != c:  # (np.sort puts NaN last: half of it)
            out[t] = np.nan
        elif top ** 2 > low ** 2 + mid ** 2 or not np.isfinite(rc):
            out[t] = 0.5 * top
        else:
            out[t] = rc
