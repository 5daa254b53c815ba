"""Curved boundaries: principal curvatures of gmsh spheres and cylinders of known radius,
chord heights against a brute-force distance to the sphere, Gauss-Bonnet against trimesh's
angle defects, and the quadratic-cell Jacobian variation against a closed form."""
import math

import gmsh
import numpy as np
import pytest

from meshcheck.curvature import (BoundarySurface, _face_midnode_deviation, boundary_surface,
                                 check_curvature, chord_height, enclosing_radius,
                                 quadratic_chord_height, quadratic_geometry, surface_curvature)
from meshcheck.jacobian import quadrature_rule
from meshcheck.mesh import CellBlock, Mesh
from meshcheck.topology import build_topology
from meshes import tet10_box

# gmsh tetra10 node order -> VTK/meshio (edges 1-3 and 2-3 swap places)
GMSH_TET10 = [0, 1, 2, 3, 4, 5, 6, 7, 9, 8]


def _gmsh(shape, R, h, order=1, length=2.0):
    gmsh.initialize()
    try:
        gmsh.option.setNumber("General.Terminal", 0)
        gmsh.model.add(shape)
        if shape == "sphere":
            gmsh.model.occ.addSphere(0, 0, 0, R)
        else:
            gmsh.model.occ.addCylinder(0, 0, 0, 0, 0, length, R)
        gmsh.model.occ.synchronize()
        gmsh.option.setNumber("Mesh.MeshSizeMin", h)
        gmsh.option.setNumber("Mesh.MeshSizeMax", h)
        gmsh.model.mesh.generate(3)
        if order == 2:
            gmsh.model.mesh.setOrder(2)
        tags, xyz, _ = gmsh.model.mesh.getNodes()
        _, nodes = gmsh.model.mesh.getElementsByType(4 if order == 1 else 11)
    finally:
        gmsh.finalize()
    index = np.zeros(int(tags.max()) + 1, np.int64)
    index[tags.astype(np.int64)] = np.arange(len(tags))
    cells = index[nodes.astype(np.int64)].reshape(-1, 4 if order == 1 else 10)
    if order == 2:
        cells = cells[:, GMSH_TET10]
    return Mesh(xyz.reshape(-1, 3), (CellBlock("tetra" if order == 1 else "tetra10", cells,
                                               np.ones(len(cells))),))


@pytest.fixture(scope="module")
def sphere():
    R = 0.5
    mesh = _gmsh("sphere", R, 0.06)
    topo = build_topology(mesh)
    return R, mesh, topo


@pytest.fixture(scope="module")
def cylinder():
    R = 0.3
    mesh = _gmsh("cylinder", R, 0.05, length=1.0)
    return R, mesh, build_topology(mesh)


COMPILED = [False, pytest.param(True, marks=pytest.mark.skipif(
    not __import__("meshcheck.kernels", fromlist=["available"]).available(),
    reason="numba not installed"))]


@pytest.mark.parametrize("compiled", COMPILED)
def test_sphere_principal_curvatures_are_one_over_r(sphere, compiled):
    R, mesh, topo = sphere
    c = surface_curvature(boundary_surface(mesh, topo), compiled=compiled)
    assert c.n_patches == 1 and c.feature_edges == 0
    # median within 3 %, 90 % of the triangles within 15 % (discretisation noise)
    for k in (c.k1, c.k2):
        assert np.median(k) * R == pytest.approx(1.0, abs=0.03)
        assert np.mean(np.abs(k * R - 1) < 0.15) > 0.9


@pytest.mark.parametrize("compiled", COMPILED)
def test_cylinder_principal_curvatures(cylinder, compiled):
    R, mesh, topo = cylinder
    surf = boundary_surface(mesh, topo)
    c = surface_curvature(surf, compiled=compiled)
    X = surf.points[surf.triangles]
    n = np.cross(X[:, 1] - X[:, 0], X[:, 2] - X[:, 0])
    side = np.abs(n[:, 2]) < 0.5 * np.linalg.norm(n, axis=1)
    assert c.n_patches == 3                      # side and two caps, split at the 90 deg rims
    assert np.median(c.k1[side]) * R == pytest.approx(1.0, abs=0.03)
    assert np.mean(np.abs(c.k1[side] * R - 1) < 0.15) > 0.9
    assert np.median(np.abs(c.k2[side])) * R < 0.03
    assert np.max(c.kmax[~side]) * R < 1e-9      # flat caps


def test_gauss_bonnet_against_trimesh_angle_defects(sphere):
    # integral of k1 k2 over a closed genus-0 surface = 4 pi; trimesh's vertex defects sum
    # to exactly that (Euler characteristic 2)
    R, mesh, topo = sphere
    surf = boundary_surface(mesh, topo)
    c = surface_curvature(surf)
    tm = surf.trimesh()
    assert tm.vertex_defects.sum() == pytest.approx(4 * math.pi, rel=1e-9)
    assert np.sum(c.k1 * c.k2 * c.area) == pytest.approx(tm.vertex_defects.sum(), rel=0.03)


def test_chord_height_on_a_sphere_matches_brute_force(sphere):
    # the largest radial gap between a flat triangle inscribed in a sphere and the sphere,
    # sampled on a dense barycentric grid, against R - sqrt(R^2 - rho^2)
    R, mesh, topo = sphere
    surf = boundary_surface(mesh, topo)
    X = surf.points[surf.triangles][:200]
    g = np.linspace(0, 1, 61)
    a, b = np.meshgrid(g, g, indexing="ij")
    keep = a + b <= 1
    w = np.column_stack([1 - a[keep] - b[keep], a[keep], b[keep]])     # (s, 3)
    P = np.einsum("sk,tkd->tsd", w, X)
    brute = (R - np.linalg.norm(P, axis=2)).max(axis=1)
    formula = chord_height(enclosing_radius(X), 1.0 / R)
    assert np.all(formula >= brute - 1e-12)
    assert np.allclose(formula, brute, rtol=2e-3)


@pytest.mark.parametrize("h_over_r", [0.05, 0.2, 0.5])
def test_quadratic_chord_height_is_the_parabola_error(h_over_r):
    # parabola through the ends and the midpoint of a circular arc of chord h: max gap
    # h^4 / (512 R^3) to leading order (x^4 term of the circle's series)
    R = 1.0
    h = h_over_r * R
    x = np.linspace(-h / 2, h / 2, 20001)
    circle = R - np.sqrt(R * R - x * x)
    y_end = R - math.sqrt(R * R - h * h / 4)
    parabola = y_end * (x / (h / 2)) ** 2
    brute = np.max(np.abs(circle - parabola))
    # next-order terms are O((h/R)^2) relative
    assert quadratic_chord_height(h / 2, 1 / R) == pytest.approx(brute, rel=0.25 * h_over_r ** 2
                                                                 + 1e-3)


def test_flagging_follows_the_tolerance(sphere):
    R, mesh, topo = sphere
    c = np.full(mesh.n_cells, 343.0)
    tau = 0.01
    low = check_curvature(mesh, topo, c, 50.0, tau)
    assert not low.misfit.any()
    # choose fmax so that the allowed gap tau / (2k) is the median gap
    gap = np.median(low.chord_height)
    f = tau * 343.0 / (2 * 2 * np.pi * gap)
    mid = check_curvature(mesh, topo, c, f, tau)
    k = 2 * np.pi * f / 343.0
    assert np.allclose(mid.tolerance, tau / (2 * k))
    assert np.array_equal(mid.misfit, mid.chord_height > mid.tolerance)
    assert 0.4 < mid.misfit.mean() < 0.6 and mid.needs_quadratic.sum() == mid.misfit.sum()
    # the advised straight size has exactly the allowed sagitta h^2/(8R) on the worst face
    i = np.searchsorted(mid.face_ids, mid.listed[0])
    h = mid.listed_straight_size[0]
    assert h ** 2 * mid.kappa[i] / 8 == pytest.approx(mid.tolerance[i], rel=1e-12)
    s_quad = quadratic_chord_height(mid.rho, mid.kappa)
    f_high = tau * 343.0 / (2 * 2 * np.pi * np.median(s_quad))
    high = check_curvature(mesh, topo, c, f_high, tau)
    assert np.array_equal(high.needs_refinement, s_quad > high.tolerance)
    assert 0.4 < high.needs_refinement.mean() < 0.6


def test_quadratic_sphere_has_curved_faces_and_no_misfit():
    R = 0.5
    mesh = _gmsh("sphere", R, 0.15, order=2)
    topo = build_topology(mesh)
    c = np.full(mesh.n_cells, 343.0)
    lin = check_curvature(mesh, topo, c, 100.0, 0.01)
    assert lin.curved.mean() > 0.95
    assert 0.6 < lin.midnode_on_surface < 1.2          # mid-nodes lie on the sphere
    # at a frequency where straight faces would not do, quadratic geometry does
    gap_straight = chord_height(lin.rho, lin.kappa)
    f = 0.01 * 343.0 / (2 * 2 * np.pi * np.median(gap_straight))
    res = check_curvature(mesh, topo, c, f, 0.01)
    assert not res.misfit.any() and not res.needs_refinement.any()
    quad = quadratic_geometry(mesh)
    assert quad.n_cells == mesh.n_cells and quad.midnode_deviation.max() > 0


def test_straight_tetra10_has_unit_jacobian_ratio():
    q = quadratic_geometry(tet10_box((2, 2, 2)))
    assert np.allclose(q.midnode_deviation, 0, atol=1e-15)
    assert np.allclose(q.jacobian_ratio, 1.0, atol=1e-13) and q.low == 0


@pytest.mark.parametrize("eps", [0.05, 0.1, 0.2])
def test_moved_midnode_jacobian_variation_closed_form(eps):
    # unit right tetrahedron, mid-node of edge 0-1 moved along the edge to x = 1/2 + eps:
    # x = r + 4 eps L0 L1 (L0 = 1 - r - s - t, L1 = r), so det J = 1 + 4 eps (L0 - L1)
    ref = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1],
                    [.5, 0, 0], [.5, .5, 0], [0, .5, 0], [0, 0, .5], [.5, 0, .5], [0, .5, .5]])
    pts = ref.copy()
    pts[4, 0] += eps
    mesh = Mesh(pts, (CellBlock("tetra10", np.arange(10)[None], np.ones(1)),))
    q = quadratic_geometry(mesh, threshold=0.99)
    r = quadrature_rule("tetra10")[0]
    detj = 1 + 4 * eps * ((1 - r.sum(axis=1)) - r[:, 0])
    assert q.midnode_deviation[0] == pytest.approx(eps)
    assert q.jacobian_ratio[0] == pytest.approx(detj.min() / detj.max(), rel=1e-12)
    assert q.low == 1 and q.listed.tolist() == [0]


def test_linear_mesh_faces_have_no_midnodes(sphere):
    """Linear meshes skip the mid-node look-up: no face has mid-nodes, no deviation, and
    the longest side is the brute-force one."""
    _, mesh, topo = sphere
    fids = np.flatnonzero(topo.faces.count == 1)
    dev, has, longest = _face_midnode_deviation(mesh, topo, fids)
    assert not has.any() and not dev.any()
    nodes = topo.faces.nodes[fids]
    assert (nodes[:, 3] < 0).all()
    P = mesh.points
    sides = [np.linalg.norm(P[nodes[:, (k + 1) % 3]] - P[nodes[:, k]], axis=1) for k in range(3)]
    np.testing.assert_array_equal(longest, np.max(sides, axis=0))


@pytest.mark.skipif(not __import__("meshcheck.kernels", fromlist=["available"]).available(),
                    reason="numba not installed")
@pytest.mark.parametrize("kind", ["tetra", "tetra10", "hexahedron"])
def test_check_curvature_on_both_paths(sphere, kind, monkeypatch):
    """The whole check with the kernels (triangle geometry, normal sums, enclosing radii,
    fits) and with numpy: the same faces flagged, the same radii, curvatures and chord
    heights to rounding (the fits' 1e-9); a linear mesh has no mid-nodes to look up
    (``Edges.has_mids`` False), a quadratic one curved faces on both paths; hexahedra
    have quadrilateral faces of two triangles each (the faces' maxima over them)."""
    quadratic = kind == "tetra10"
    if quadratic:
        mesh = _gmsh("sphere", 0.5, 0.15, order=2)
        topo = build_topology(mesh)
    elif kind == "hexahedron":
        mesh = _hex_cylinder()
        topo = build_topology(mesh)
    else:
        _, mesh, topo = sphere
    assert topo.edges.has_mids == quadratic
    c = np.full(mesh.n_cells, 343.0)
    h = check_curvature(mesh, topo, c, 50.0, 0.01).chord_height
    f = 0.01 * 343.0 / (2 * 2 * np.pi * np.median(h[h > 0]))  # half the curved faces over
    out = {}
    for mode in ("numpy", "numba"):
        monkeypatch.setenv("MESHCHECK_KERNELS", mode)
        out[mode] = check_curvature(mesh, topo, c, f, 0.01)
    ref, got = out["numpy"], out["numba"]
    np.testing.assert_array_equal(got.rho, ref.rho)
    for name in ("kappa", "chord_height", "tolerance"):
        np.testing.assert_allclose(getattr(got, name), getattr(ref, name), rtol=1e-9, atol=0)
    for name in ("face_ids", "curved", "misfit", "needs_quadratic", "needs_refinement"):
        np.testing.assert_array_equal(getattr(got, name), getattr(ref, name), err_msg=name)
    # the worst faces: the same ratios; the same faces where no two ratios tie to rounding
    # (the structured ring's faces tie exactly, and rounding orders them)
    np.testing.assert_allclose(got.listed_ratio, ref.listed_ratio, rtol=1e-9)
    if np.all(np.diff(-ref.listed_ratio) > 1e-9 * ref.listed_ratio[:-1]):
        np.testing.assert_array_equal(got.listed, ref.listed)
        np.testing.assert_array_equal(got.listed_cells, ref.listed_cells)
    else:
        assert kind == "hexahedron"
    assert (ref.n_patches, ref.feature_edges) == (got.n_patches, got.feature_edges)
    assert got.curved.any() == quadratic and (got.midnode_on_surface is None) != quadratic
    assert 0 < ref.misfit.sum() + ref.needs_refinement.sum() < len(ref.face_ids)


@pytest.mark.parametrize("kernels", ["numpy", "numba"])
def test_moved_midnode_closed_form_on_both_paths(kernels, monkeypatch):
    """The compiled quadratic_geometry (and the validity pass that keeps the det J ratio)
    meets the closed form too."""
    from meshcheck.validity import min_scaled_jacobian

    monkeypatch.setenv("MESHCHECK_KERNELS", kernels)
    eps = 0.1
    ref = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1],
                    [.5, 0, 0], [.5, .5, 0], [0, .5, 0], [0, 0, .5], [.5, 0, .5], [0, .5, .5]])
    pts = ref.copy()
    pts[4, 0] += eps
    mesh = Mesh(pts, (CellBlock("tetra10", np.arange(10)[None].repeat(3, axis=0), np.ones(3)),))
    min_scaled_jacobian(mesh)
    q = quadratic_geometry(mesh, threshold=0.99)
    r = quadrature_rule("tetra10")[0]
    detj = 1 + 4 * eps * ((1 - r.sum(axis=1)) - r[:, 0])
    np.testing.assert_allclose(q.midnode_deviation, eps, rtol=1e-12)
    np.testing.assert_allclose(q.jacobian_ratio, detj.min() / detj.max(), rtol=1e-12)
    assert q.low == 3 and q.listed.tolist() == [0, 1, 2]
    np.testing.assert_allclose(q.listed_locations, 0.25, rtol=1e-15)


def _geometry_cases(sphere, cylinder):
    """Boundary surfaces of the gmsh sphere and cylinder, and a hand-made one with a
    zero-area face, a face with a repeated vertex and an edge used by three faces."""
    out = []
    for _, mesh, topo in (sphere, cylinder):
        out.append(boundary_surface(mesh, topo))
    pts = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [1, 1, 0.2], [0.5, 0, 0], [0, 0, 1],
                    [1, 0, 1], [0.3, 0.3, -1]], float)
    tri = np.array([[0, 1, 2], [1, 3, 2], [0, 4, 1], [0, 1, 1], [0, 1, 5], [1, 6, 5],
                    [2, 1, 7], [3, 1, 6]], np.int64)
    z = np.zeros(len(tri), np.int64)
    out.append(BoundarySurface(np.arange(len(pts)), pts, tri, z, z))
    return out


@pytest.mark.parametrize("chunk", [None, 7])
def test_surface_geometry_equals_trimesh(sphere, cylinder, chunk, monkeypatch):
    """Normals, areas, adjacency, adjacency angles and corner angles computed without
    trimesh equal trimesh's, bit for bit (adjacent pairs compared as sorted rows); also
    computed a few triangles and pairs at a time."""
    import meshcheck.curvature as cv
    from meshcheck.curvature import _surface_geometry, _trimesh_geometry

    if chunk:
        monkeypatch.setattr(cv, "_FIT_CHUNK", chunk)

    for surf in _geometry_cases(sphere, cylinder):
        fn, area, adj, ang, corner = _surface_geometry(surf.points, surf.triangles)
        tfn, tarea, tadj, tang, tcorner = _trimesh_geometry(surf)
        np.testing.assert_array_equal(fn, tfn)
        np.testing.assert_array_equal(area, tarea)
        np.testing.assert_array_equal(corner, tcorner)
        o, to = np.lexsort(adj.T[::-1]), np.lexsort(tadj.T[::-1])
        np.testing.assert_array_equal(adj[o], tadj[to])
        np.testing.assert_array_equal(ang[o], tang[to])
    assert len(adj) > 0 and (fn == 0).all(axis=1).any() and (corner == 0).all(axis=1).any()


@pytest.mark.skipif(not __import__("meshcheck.kernels", fromlist=["available"]).available(),
                    reason="numba not installed")
def test_compiled_surface_geometry_equals_trimesh(sphere, cylinder):
    """The kernels' normals and areas equal trimesh's bit for bit (the same operations a
    triangle at a time), the adjacency too; the angles (arccos: libm's against numpy's
    own) to 1e-12 rad; degenerate faces zero as in trimesh."""
    from meshcheck.curvature import _surface_geometry, _trimesh_geometry

    # a needle whose one tiny angle (1e-9 rad, below trimesh's 1e-8) is at its third corner
    needle = BoundarySurface(np.arange(4), np.array([[0, 0, 0], [1, 0, 0], [0.5, 1e9, 0],
                                                     [0.5, -1, 0]], float),
                             np.array([[0, 1, 2], [1, 0, 3]]), np.zeros(2, np.int64),
                             np.zeros(2, np.int64))
    for surf in _geometry_cases(sphere, cylinder) + [needle]:
        fn, area, adj, ang, corner = _surface_geometry(surf.points, surf.triangles, True)
        tfn, tarea, tadj, tang, tcorner = _trimesh_geometry(surf)
        if surf is not needle:
            seen = (fn, corner, adj)
        np.testing.assert_array_equal(fn, tfn)
        np.testing.assert_array_equal(area, tarea)
        np.testing.assert_allclose(corner, tcorner, rtol=0.0, atol=1e-12)
        assert np.array_equal(corner == 0, tcorner == 0)
        o, to = np.lexsort(adj.T[::-1]), np.lexsort(tadj.T[::-1])
        np.testing.assert_array_equal(adj[o], tadj[to])
        np.testing.assert_allclose(ang[o], tang[to], rtol=0.0, atol=1e-12)
    assert (corner[0] == 0).all() and (corner[1] > 0).all()  # (the needle's)
    fn, corner, adj = seen  # the hand-made case's: degenerate faces
    assert len(adj) > 0 and (fn == 0).all(axis=1).any() and (corner == 0).all(axis=1).any()


@pytest.mark.skipif(not __import__("meshcheck.kernels", fromlist=["available"]).available(),
                    reason="numba not installed")
def test_compiled_enclosing_radii_equal_numpy(sphere, cylinder):
    """kernels.geometry.enclosing_radii against enclosing_radius (whose circumradius and
    half longest side are checked against the sphere above): the same bits, also for
    obtuse, right, degenerate and NaN triangles."""
    from meshcheck.kernels import geometry as kg

    pts = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [3, 0.1, 0], [2, 0, 0], [np.nan, 0, 0],
                    [1, 1, 0]], float)
    odd = np.array([[0, 1, 2], [0, 1, 3], [0, 1, 4], [0, 0, 1], [0, 1, 5], [1, 6, 2],
                    [2, 6, 0]], np.int64)
    cases = [(pts, odd)] + [(s.points, s.triangles) for s in _geometry_cases(sphere, cylinder)]
    for P, T in cases:
        ref = enclosing_radius(P[T])
        got = np.empty(len(T))
        kg.enclosing_radii(P, np.ascontiguousarray(T), got)
        np.testing.assert_array_equal(got, ref)
        if P is pts:  # NaN corner; obtuse: half the longest side; right: circumradius
            assert np.isnan(got[4]) and got[1] == 0.5 * np.linalg.norm(pts[3])
            assert got[0] == pytest.approx(0.5 * np.sqrt(2.0), rel=1e-15)


def test_compact_ids_is_numpys_unique_with_inverse():
    from meshcheck.curvature import _compact_ids

    rng = np.random.default_rng(3)
    for n, k in ((50, 400), (10_000, 300), (1, 5), (7, 0)):
        ids = rng.integers(0, n, k)
        vid, inv = _compact_ids(ids, n)
        want, winv = np.unique(ids, return_inverse=True)
        np.testing.assert_array_equal(vid, want)
        np.testing.assert_array_equal(inv, winv)
        assert inv.dtype == np.int64


def test_vertex_patch_rows_number_the_distinct_pairs(cylinder):
    # one row per distinct (vertex, patch) pair, whatever the numbering: the rows and
    # np.unique's inverse of the pairs' keys are a bijection of the same size; the
    # cylinder's rims are feature edges, so their vertices are in two patches
    from meshcheck.curvature import _vertex_patch_rows

    _, mesh, topo = cylinder
    surf = boundary_surface(mesh, topo)
    curv = surface_curvature(surf, 50.0)
    assert curv.n_patches >= 3
    tri = surf.triangles
    rows, n_rows = _vertex_patch_rows(tri, curv.patch, len(surf.points), curv.n_patches)
    uk, want = np.unique((tri * curv.n_patches + curv.patch[:, None]).ravel(),
                         return_inverse=True)
    assert n_rows == len(uk) > len(surf.points)
    assert rows.min() == 0 and rows.max() == n_rows - 1
    pairs = np.unique(np.column_stack([rows, want.reshape(-1)]), axis=0)
    assert len(pairs) == n_rows  # rows <-> keys one to one
    one = np.zeros(len(tri), np.int64)  # a single patch: each vertex its own row
    rows1, n1 = _vertex_patch_rows(tri, one, len(surf.points), 1)
    np.testing.assert_array_equal(rows1, tri.ravel())
    assert n1 == len(surf.points)


@pytest.mark.parametrize("compiled", COMPILED)
def test_curvatures_do_not_depend_on_the_rows_numbering(cylinder, compiled, monkeypatch):
    # the corner normals summed per (vertex, patch) row in triangle order: numbered by
    # np.unique of the pairs' keys (the former code) the curvatures are the same bits
    import meshcheck.curvature as cv

    _, mesh, topo = cylinder
    surf = boundary_surface(mesh, topo)
    ours = surface_curvature(surf, 50.0, compiled)

    def by_unique(tri, patch, n_v, n_patch):
        uk, inv = np.unique((tri * np.int64(n_patch) + patch[:, None]).ravel(),
                            return_inverse=True)
        return inv.reshape(-1), len(uk)

    monkeypatch.setattr(cv, "_vertex_patch_rows", by_unique)
    ref = surface_curvature(surf, 50.0, compiled)
    np.testing.assert_array_equal(ours.k1, ref.k1)
    np.testing.assert_array_equal(ours.k2, ref.k2)


def test_surface_curvature_unchanged_without_trimesh(sphere, cylinder, monkeypatch):
    import meshcheck.curvature as cv

    for surf in _geometry_cases(sphere, cylinder)[:2]:
        ours = surface_curvature(surf, 50.0)
        monkeypatch.setattr(cv, "_surface_geometry",
                            lambda p, t, compiled=False, s=surf: cv._trimesh_geometry(s))
        ref = surface_curvature(surf, 50.0)
        monkeypatch.undo()
        for name in ("k1", "k2", "patch", "area"):
            np.testing.assert_array_equal(getattr(ours, name), getattr(ref, name), err_msg=name)
        assert (ours.n_patches, ours.feature_edges) == (ref.n_patches, ref.feature_edges)


def _curvature_reference(mesh, topo, speed):
    """kappa and rho per boundary face by the general formula (np.unique of the faces of
    the triangles, maximum over each face's triangles), the reference of the shortcut
    check_curvature takes when every face is one triangle."""
    from meshcheck import kernels

    surf = boundary_surface(mesh, topo)
    curv = surface_curvature(surf, 50.0, kernels.use_compiled(mesh.n_cells))  # as the check
    rho_t = enclosing_radius(surf.points[surf.triangles])
    kap_t = np.where(np.isfinite(curv.kmax), curv.kmax, 0.0)
    fids, inv = np.unique(surf.face, return_inverse=True)
    kappa, rho = np.zeros(len(fids)), np.zeros(len(fids))
    np.maximum.at(kappa, inv, kap_t)
    np.maximum.at(rho, inv, rho_t)
    return fids, kappa, rho


def _hex_cylinder():
    """A structured hexahedral ring about the z axis (curved outer and inner walls,
    quadrilateral boundary faces: two triangles per face)."""
    nr, nt, nz = 3, 24, 2
    r = np.linspace(0.2, 0.5, nr + 1)
    t = np.linspace(0, 2 * np.pi, nt, endpoint=False)
    z = np.linspace(0, 0.3, nz + 1)
    R, Tt, Z = np.meshgrid(r, t, z, indexing="ij")
    pts = np.column_stack([(R * np.cos(Tt)).ravel(), (R * np.sin(Tt)).ravel(), Z.ravel()])

    def nid(i, j, k):
        return (i * nt + j % nt) * (nz + 1) + k
    cells = [[nid(i, j, k), nid(i + 1, j, k), nid(i + 1, j + 1, k), nid(i, j + 1, k),
              nid(i, j, k + 1), nid(i + 1, j, k + 1), nid(i + 1, j + 1, k + 1),
              nid(i, j + 1, k + 1)] for i in range(nr) for j in range(nt) for k in range(nz)]
    cells = np.array(cells, np.int64)
    return Mesh(pts, (CellBlock("hexahedron", cells, np.ones(len(cells))),))


@pytest.mark.parametrize("case", ["tetra", "hexahedron"])
def test_per_face_curvature_equals_the_general_formula(case, sphere):
    """Triangles only (the elementwise shortcut) and quadrilaterals (two triangles per
    face, the unique and maximum.at path): kappa and rho per face equal the formula,
    bitwise, and the quadrilateral case does take the other branch."""
    if case == "tetra":
        _, mesh, topo = sphere
    else:
        mesh = _hex_cylinder()
        topo = build_topology(mesh)
    speed = np.full(mesh.n_cells, 343.0)
    cb = check_curvature(mesh, topo, speed, 2000.0, 0.01)
    fids, kappa, rho = _curvature_reference(mesh, topo, speed)
    np.testing.assert_array_equal(cb.face_ids, fids)
    np.testing.assert_array_equal(cb.kappa, kappa)
    np.testing.assert_array_equal(cb.rho, rho)
    assert (kappa > 0).any()
    surf = boundary_surface(mesh, topo)
    assert (np.diff(surf.face) > 0).all() == (case == "tetra")


@pytest.mark.parametrize("seed", range(4))
def test_patch_labels_by_union_find_equal_scipy(seed):
    # the compiled path labels smooth patches by union-find instead of scipy's
    # connected_components: the same count and the same numbering (by smallest item)
    from meshcheck.curvature import _patches

    rng = np.random.default_rng(seed)
    n = int(rng.integers(1, 400))
    k = int(rng.integers(0, 2 * n))
    pairs = rng.integers(0, n, (k, 2))
    pairs[: k // 10, 1] = pairs[: k // 10, 0]  # self-loops
    ref = _patches(n, pairs, compiled=False)
    got = _patches(n, pairs, compiled=True)
    assert got[0] == ref[0]
    assert np.array_equal(got[1], ref[1]) and got[1].dtype == ref[1].dtype == np.int64


def test_curvature_fits_in_chunks_equal_one_pass(sphere, cylinder, monkeypatch):
    # chunking only bounds the scratch memory: the same curvatures to the bit
    from meshcheck import curvature as CV

    for _, mesh, topo in (sphere, cylinder):
        surf = boundary_surface(mesh, topo)
        whole = surface_curvature(surf)
        with monkeypatch.context() as m:
            m.setattr(CV, "_FIT_CHUNK", 37)
            parts = surface_curvature(surf)
        assert len(surf.triangles) > 3 * 37
        assert np.array_equal(whole.k1, parts.k1, equal_nan=True)
        assert np.array_equal(whole.k2, parts.k2, equal_nan=True)
        # the triangles' normals, areas and corner angles too (trimesh's operations)
        one = CV._surface_geometry(surf.points, surf.triangles)
        with monkeypatch.context() as m:
            m.setattr(CV, "_FIT_CHUNK", 37)
            many = CV._surface_geometry(surf.points, surf.triangles)
        for x, y in zip(one, many):
            assert np.array_equal(x, y)
        # the enclosing radii of check_curvature are made in the same chunks: the same
        # radii, curvatures and chord heights as in one pass
        c = np.full(mesh.n_cells, 343.0)
        one = check_curvature(mesh, topo, c, 2000.0, 0.01)
        with monkeypatch.context() as m:
            m.setattr(CV, "_FIT_CHUNK", 37)
            many = check_curvature(mesh, topo, c, 2000.0, 0.01)
        for name in ("rho", "kappa", "chord_height", "tolerance"):
            assert np.array_equal(getattr(one, name), getattr(many, name)), name


@pytest.mark.skipif(not __import__("meshcheck.kernels", fromlist=["available"]).available(),
                    reason="numba not installed")
def test_compiled_curvature_fits_equal_numpy(sphere, cylinder):
    # the kernel solves the same normal equations by Gaussian elimination with partial
    # pivoting (numpy: LAPACK's gesv): the same curvatures to rounding, NaN in the same
    # places (degenerate triangles: a collapsed one added)
    hexes = _hex_cylinder()
    for mesh, topo in ((sphere[1], sphere[2]), (cylinder[1], cylinder[2]),
                       (hexes, build_topology(hexes))):
        surf = boundary_surface(mesh, topo)
        tri = np.vstack([surf.triangles, [[0, 0, 1]]])
        surf = BoundarySurface(surf.vertex_ids, surf.points, tri,
                               np.r_[surf.face, surf.face[-1]], np.r_[surf.cell, surf.cell[-1]])
        ref = surface_curvature(surf, 50.0, compiled=False)
        got = surface_curvature(surf, 50.0, compiled=True)
        scale = np.nanmax(np.abs(ref.k1))
        for a, b in ((ref.k1, got.k1), (ref.k2, got.k2)):
            assert np.array_equal(np.isnan(a), np.isnan(b)) and np.isnan(a[-1])
            np.testing.assert_allclose(b, a, rtol=1e-9, atol=1e-12 * scale)
        assert np.array_equal(ref.patch, got.patch)
