"""Tests of meshcheck.jacobian against VTK, gmsh and closed forms."""
from __future__ import annotations

import numpy as np
import pytest

from meshcheck import jacobian as jb
from meshcheck.cells import CELL_TYPES

vtk = pytest.importorskip("vtk")

ALL_TYPES = sorted(CELL_TYPES)
QUADRATIC = sorted(t for t, c in CELL_TYPES.items() if c.quadratic)
LINEAR = sorted(t for t, c in CELL_TYPES.items() if not c.quadratic)
WHERE = ("corners", "nodes", "quadrature")

VTK_CELL = {
    "tetra": "vtkTetra", "tetra10": "vtkQuadraticTetra", "hexahedron": "vtkHexahedron",
    "hexahedron20": "vtkQuadraticHexahedron", "hexahedron27": "vtkTriQuadraticHexahedron",
    "wedge": "vtkWedge", "wedge15": "vtkQuadraticWedge", "pyramid": "vtkPyramid",
    "triangle": "vtkTriangle", "triangle6": "vtkQuadraticTriangle", "quad": "vtkQuad",
    "quad8": "vtkQuadraticQuad", "quad9": "vtkBiQuadraticQuad",
}

# measure of the parametric domain (the pyramid's is VTK's collapsed unit cube)
PARAM_MEASURE = {"tetra": 1 / 6, "hexahedron": 1.0, "wedge": 0.5, "pyramid": 1.0,
                 "triangle": 0.5, "quad": 1.0}
# measure of the reference cell itself (the VTK pyramid has apex (0,0,1): volume 1/3)
REF_MEASURE = {"tetra": 1 / 6, "hexahedron": 1.0, "wedge": 0.5, "pyramid": 1 / 3,
               "triangle": 0.5, "quad": 1.0}


def _vtk_cell(cell_type):
    return getattr(vtk, VTK_CELL[cell_type])()


def _random_ref_points(cell_type, q=7, seed=0):
    """Points inside the reference cell (simplices: inside the simplex)."""
    rng = np.random.default_rng(seed)
    info = CELL_TYPES[cell_type]
    p = rng.uniform(0.02, 0.98, size=(q, 3))
    if info.linear in ("tetra", "triangle"):
        p *= 0.98 / np.maximum(1.0, p[:, : info.dim].sum(axis=1, keepdims=True) + 0.01)
    if info.linear == "wedge":
        p[:, :2] *= 0.98 / np.maximum(1.0, p[:, :2].sum(axis=1, keepdims=True) + 0.01)
    if info.dim == 2:
        p[:, 2] = 0.0
    return p


def _mirror_permutation(cell_type):
    """Node relabelling that swaps the r and s parametric coordinates: a reflection."""
    ref = CELL_TYPES[cell_type].ref_coords
    swapped = ref[:, [1, 0, 2]]
    perm = [int(np.flatnonzero(np.all(np.isclose(ref, s), axis=1))[0]) for s in swapped]
    assert sorted(perm) == list(range(len(ref)))
    return np.array(perm)


# ------------------------------------------------------------ node order vs VTK
@pytest.mark.parametrize("cell_type", ALL_TYPES)
def test_ref_coords_are_vtk_parametric_coords(cell_type):
    """cells.ref_coords must equal vtkCell::GetParametricCoords (node order = VTK)."""
    cell = _vtk_cell(cell_type)
    n = cell.GetNumberOfPoints()
    pc = cell.GetParametricCoords()
    vtk_ref = np.array([pc[i] for i in range(3 * n)]).reshape(n, 3)
    np.testing.assert_array_equal(CELL_TYPES[cell_type].ref_coords, vtk_ref)


@pytest.mark.parametrize("cell_type", ALL_TYPES)
def test_shape_functions_match_vtk(cell_type):
    """N_i and dN_i/d(r,s,t) against vtkCell::InterpolateFunctions / InterpolateDerivs."""
    info = CELL_TYPES[cell_type]
    cell = _vtk_cell(cell_type)
    p = _random_ref_points(cell_type)
    N = jb.shape_functions(cell_type, p)
    dN = jb.shape_gradients(cell_type, p)
    n = info.n_nodes
    for k, pk in enumerate(p):
        w = [0.0] * n
        cell.InterpolateFunctions(list(pk), w)
        d = [0.0] * (info.dim * n)
        cell.InterpolateDerivs(list(pk), d)
        np.testing.assert_allclose(N[k], w, rtol=0, atol=1e-14)
        np.testing.assert_allclose(dN[k, :, : info.dim], np.array(d).reshape(info.dim, n).T,
                                   rtol=0, atol=1e-13)
    if info.dim == 2:
        assert np.all(dN[:, :, 2] == 0.0)


@pytest.mark.parametrize("cell_type", ALL_TYPES)
def test_partition_of_unity(cell_type):
    p = _random_ref_points(cell_type, seed=1)
    np.testing.assert_allclose(jb.shape_functions(cell_type, p).sum(axis=1), 1.0, rtol=0, atol=1e-14)
    np.testing.assert_allclose(jb.shape_gradients(cell_type, p).sum(axis=1), 0.0, rtol=0, atol=1e-13)


@pytest.mark.parametrize("cell_type", ALL_TYPES)
def test_shape_functions_interpolate_nodes(cell_type):
    """N_i(x_j) = delta_ij at the nodal reference coordinates."""
    ref = CELL_TYPES[cell_type].ref_coords
    np.testing.assert_allclose(jb.shape_functions(cell_type, ref), np.eye(len(ref)), rtol=0, atol=1e-14)


# ------------------------------------------------------------ reference cells
@pytest.mark.parametrize("where", WHERE)
@pytest.mark.parametrize("cell_type", ALL_TYPES)
def test_reference_cell_has_closed_form_jacobian(cell_type, where):
    """The reference cell as physical cell: the map is the identity (det J = 1), except
    VTK's pyramid x = ((1-t) r, (1-t) s, t) with det J = (1-t)^2 > 0."""
    info = CELL_TYPES[cell_type]
    cells = np.arange(info.n_nodes)[None]
    det = jb.jacobian_determinants(info.ref_coords, cells, cell_type, where)
    pts = jb.sample_points(cell_type, where)
    expected = (1.0 - pts[:, 2]) ** 2 if info.linear == "pyramid" else np.ones(len(pts))
    np.testing.assert_allclose(det[0], expected, rtol=1e-13)
    assert np.all(det > 0)


@pytest.mark.parametrize("where", WHERE)
@pytest.mark.parametrize("cell_type", ALL_TYPES)
def test_reflected_cell_is_negative(cell_type, where):
    """Relabelling the nodes by the r <-> s reflection (for tetra and triangle a
    swap of nodes 1 and 2) inverts the cell: det J < 0 at every sample point."""
    info = CELL_TYPES[cell_type]
    perm = _mirror_permutation(cell_type)
    cells = perm[None]
    det = jb.jacobian_determinants(info.ref_coords, cells, cell_type, where)
    assert np.all(det < 0)
    assert jb.scaled_jacobian_min(info.ref_coords, cells, cell_type, where)[0] < 0


def test_swap_of_two_tet_nodes_flips_sign():
    ref = CELL_TYPES["tetra"].ref_coords
    good = jb.jacobian_determinants(ref, np.array([[0, 1, 2, 3]]), "tetra")
    bad = jb.jacobian_determinants(ref, np.array([[0, 2, 1, 3]]), "tetra")
    np.testing.assert_allclose(bad, -good, rtol=1e-15)


@pytest.mark.parametrize("cell_type", ALL_TYPES)
def test_scaling_multiplies_det_by_s_to_the_dim(cell_type):
    """Units: det J scales as length^dim; the scaled Jacobian is dimensionless."""
    info = CELL_TYPES[cell_type]
    rng = np.random.default_rng(3)
    pts = info.ref_coords + 0.05 * rng.normal(size=info.ref_coords.shape)
    if info.dim == 2:
        pts[:, 2] = 0.0
    cells = np.arange(info.n_nodes)[None]
    d1 = jb.jacobian_determinants(pts, cells, cell_type, "quadrature")
    d2 = jb.jacobian_determinants(2.5 * pts, cells, cell_type, "quadrature")
    np.testing.assert_allclose(d2, 2.5 ** info.dim * d1, rtol=1e-12)
    np.testing.assert_allclose(jb.scaled_jacobian_min(2.5 * pts, cells, cell_type, "quadrature"),
                               jb.scaled_jacobian_min(pts, cells, cell_type, "quadrature"), rtol=1e-12)


# ------------------------------------------------------------ quadrature
@pytest.mark.parametrize("cell_type", ALL_TYPES)
def test_quadrature_weights_sum_to_parametric_measure(cell_type):
    pts, w = jb.quadrature_rule(cell_type)
    assert pts.shape == (len(w), 3)
    np.testing.assert_allclose(w.sum(), PARAM_MEASURE[CELL_TYPES[cell_type].linear], rtol=1e-14)
    assert np.all(w > 0)


@pytest.mark.parametrize("alpha", [0.0, 1.0, 2.0])
@pytest.mark.parametrize("n", [1, 2, 3, 5])
def test_gauss_jacobi_rule_is_scipys_and_exact(n, alpha):
    # the 1D rules of the collapsed cells (Golub-Welsch in numpy) against scipy's
    # roots_jacobi, and exact for the weight (1 - x)^alpha times x^m, m <= 2n - 1:
    # the integral over [0, 1] is the Beta function B(m + 1, alpha + 1)
    from math import gamma

    from scipy.special import roots_jacobi

    x, w = jb._gauss_01(n, alpha)
    xr, wr = roots_jacobi(n, alpha, 0.0)
    np.testing.assert_allclose(x, 0.5 * (xr + 1.0), rtol=0, atol=1e-15)
    np.testing.assert_allclose(w, wr * 0.5 ** (alpha + 1.0), rtol=1e-14)
    for m in range(2 * n):
        exact = gamma(m + 1) * gamma(alpha + 1) / gamma(m + alpha + 2)
        assert abs((w * x ** m).sum() - exact) <= 1e-14 * exact


@pytest.mark.parametrize("cell_type", LINEAR)
def test_quadrature_volume_of_affine_cell(cell_type):
    """Closed form: an affine image A x + b of the reference cell has measure det(A) |K|."""
    info = CELL_TYPES[cell_type]
    d = info.dim
    A = np.eye(3)
    A[:d, :d] = np.array([[1.3, 0.2, -0.1], [0.1, 0.9, 0.3], [-0.2, 0.1, 1.1]])[:d, :d]
    pts = info.ref_coords @ A.T + np.array([0.3, -1.0, 0.0 if d == 2 else 2.0])
    _, w = jb.quadrature_rule(cell_type)
    det = jb.jacobian_determinants(pts, np.arange(info.n_nodes)[None], cell_type, "quadrature")
    np.testing.assert_allclose((det * w).sum(), np.linalg.det(A[:d, :d]) * REF_MEASURE[info.linear],
                               rtol=1e-13)


def _quadratic_map_volume(linear, b, c, e):
    """Measure of phi(K), phi(x,y,z) = (x + b y^2, y + c z^2, z + e x^2) (3D) or
    (x + b y^2, y + c x^2) (2D): det grad phi = 1 + 8 b c e x y z  resp. 1 - 4 b c x y,
    integrated in closed form (int_tet xyz = 1/720, int_cube = 1/8, int_wedge = 1/48,
    int_tri xy = 1/24, int_square = 1/4)."""
    return {"tetra": 1 / 6 + 8 * b * c * e / 720, "hexahedron": 1 + 8 * b * c * e / 8,
            "wedge": 0.5 + 8 * b * c * e / 48, "triangle": 0.5 - 4 * b * c / 24,
            "quad": 1 - 4 * b * c / 4}[linear]


@pytest.mark.parametrize("cell_type", QUADRATIC)
def test_quadrature_volume_of_curved_cell(cell_type):
    """Quadratic cells reproduce a quadratic map exactly; the rule must integrate its
    (cubic to degree-5) det J exactly."""
    info = CELL_TYPES[cell_type]
    b, c, e = 0.3, -0.2, 0.25
    x, y, z = info.ref_coords.T
    if info.dim == 3:
        pts = np.column_stack([x + b * y ** 2, y + c * z ** 2, z + e * x ** 2])
    else:
        pts = np.column_stack([x + b * y ** 2, y + c * x ** 2, np.zeros_like(x)])
    _, w = jb.quadrature_rule(cell_type)
    det = jb.jacobian_determinants(pts, np.arange(info.n_nodes)[None], cell_type, "quadrature")
    np.testing.assert_allclose((det * w).sum(), _quadratic_map_volume(info.linear, b, c, e), rtol=1e-13)


# ------------------------------------------------------------ curved tet10
def test_tet10_inverted_inside_with_positive_corners():
    """Mid-node 4 (edge 0-1) pushed across the face 1-2-3 opposite corner 0, to
    (0.5, 0.5, 0.5); mid-node 5 (edge 1-2) moved out to (1, 0.5, 0) keeps the
    corner-1 Jacobian positive.  det J is linear in each nodal position, so with a
    single displaced mid-node of a straight tet10 it is affine in (r,s,t) and its
    minimum sits at a corner: two displaced mid-nodes are needed for a fold that
    the corner check misses."""
    pts = CELL_TYPES["tetra10"].ref_coords.copy()
    pts[4] = [0.5, 0.5, 0.5]
    pts[5] = [1.0, 0.5, 0.0]
    cells = np.arange(10)[None]
    corners = jb.jacobian_determinants(pts, cells, "tetra10", "corners")
    inner = jb.jacobian_determinants(pts, cells, "tetra10", "quadrature")
    assert np.all(corners > 0)
    assert inner.min() < 0
    assert jb.scaled_jacobian_min(pts, cells, "tetra10", "corners")[0] > 0
    assert jb.scaled_jacobian_min(pts, cells, "tetra10", "quadrature")[0] < 0


def test_single_displaced_midnode_folds_first_at_a_corner():
    """The claim used above: one displaced mid-node of a straight tet10 never makes a
    quadrature point negative while the corners stay positive."""
    rng = np.random.default_rng(11)
    ref = CELL_TYPES["tetra10"].ref_coords
    cells = np.arange(10)[None]
    hidden = 0
    folded = 0
    for _ in range(300):
        pts = ref.copy()
        pts[rng.integers(4, 10)] += rng.normal(size=3) * rng.uniform(0.0, 1.0)
        corners = jb.jacobian_determinants(pts, cells, "tetra10", "corners").min()
        inner = jb.jacobian_determinants(pts, cells, "tetra10", "quadrature").min()
        hidden += corners > 0 and inner < 0
        folded += inner < 0
    assert folded > 20          # the sample does contain folded cells
    assert hidden == 0


# ------------------------------------------------------------ against gmsh
@pytest.fixture(scope="module")
def gmsh_api():
    gmsh = pytest.importorskip("gmsh")
    gmsh.initialize(interruptible=False)
    gmsh.option.setNumber("General.Terminal", 0)
    yield gmsh
    gmsh.finalize()


def test_tet10_determinants_match_gmsh(gmsh_api):
    """Curved second-order tets of a cylinder: det J at the quadrature points equals
    gmsh's getJacobians (same reference tetrahedron; gmsh numbers the last two
    mid-nodes the other way round, found from its local node coordinates)."""
    gmsh = gmsh_api
    gmsh.model.add("cyl")
    gmsh.model.occ.addCylinder(0, 0, 0, 0, 0, 1, 0.5)
    gmsh.model.occ.synchronize()
    gmsh.option.setNumber("Mesh.MeshSizeMax", 0.3)
    gmsh.model.mesh.generate(3)
    gmsh.model.mesh.setOrder(2)
    tags, coords, _ = gmsh.model.mesh.getNodes()
    points = coords.reshape(-1, 3)
    index = np.full(int(tags.max()) + 1, -1)
    index[tags.astype(np.int64)] = np.arange(len(tags))
    etype = gmsh.model.mesh.getElementType("tetrahedron", 2)
    etags, enodes = gmsh.model.mesh.getElementsByType(etype)
    gcells = index[enodes.astype(np.int64)].reshape(-1, 10)
    local = np.array(gmsh.model.mesh.getElementProperties(etype)[4]).reshape(10, 3)
    ref = CELL_TYPES["tetra10"].ref_coords
    perm = [int(np.flatnonzero(np.all(np.isclose(local, r), axis=1))[0]) for r in ref]
    cells = gcells[:, perm]
    qp, w = jb.quadrature_rule("tetra10")
    _, gdet, _ = gmsh.model.mesh.getJacobians(etype, qp.ravel().tolist())
    gdet = np.asarray(gdet).reshape(len(etags), -1)
    mine = jb.jacobian_determinants(points, cells, "tetra10", "quadrature")
    gmsh.model.remove()
    assert perm != list(range(10))
    np.testing.assert_allclose(mine, gdet, rtol=1e-12, atol=1e-12 * np.abs(gdet).max())
    # total volume of the curved mesh approaches the cylinder's pi r^2 h
    np.testing.assert_allclose((mine * w).sum(), np.pi * 0.25, rtol=2e-3)


# ------------------------------------------------------------ API details
def test_pyramid_corners_exclude_apex():
    pts = jb.sample_points("pyramid", "corners")
    np.testing.assert_array_equal(pts, CELL_TYPES["pyramid"].ref_coords[:4])


def test_unknown_sample_kind_raises():
    with pytest.raises(ValueError):
        jb.sample_points("tetra", "edges")


def test_chunking_by_caller_is_consistent():
    rng = np.random.default_rng(5)
    info = CELL_TYPES["hexahedron20"]
    m = 50
    pts = (info.ref_coords[None] + 0.1 * rng.normal(size=(m, 20, 3))).reshape(-1, 3)
    cells = np.arange(m * 20).reshape(m, 20)
    whole = jb.jacobian_determinants(pts, cells, "hexahedron20", "quadrature")
    parts = np.vstack([jb.jacobian_determinants(pts, cells[i:i + 7], "hexahedron20", "quadrature")
                       for i in range(0, m, 7)])
    np.testing.assert_allclose(whole, parts, rtol=1e-13)   # BLAS blocking may differ by rounding
    assert whole.shape == (m, 27)
