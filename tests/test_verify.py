"""Real Helmholtz solves at the advised orders (meshcheck.verify) and the 3D correction.

References outside the project: NGSolve (general-purpose high-order FE library) and
closed-form exact solutions of -lap u - k^2 u = 0: plane waves exp(i k d.x) and the
free-field Green's function exp(i k r) / (4 pi r); the divergence theorem for the
boundary normals; the 1D model of meshcheck.dispersion for the corrected limits.
Solver tests are skipped without NGSolve (``pip install "meshcheck[verify]"``).
"""
import json

import meshio
import numpy as np
import pytest

from meshcheck import verify as V
from meshcheck.advice import SIZE_FACTOR_TABLE, AdviceSettings, advise, size_correction
from meshcheck.cli import main
from meshcheck.cost import entity_orders, variable_order_dofs
from meshcheck.dispersion import usable_kh
from meshcheck.errors import SettingsError
from meshcheck.mesh import CellBlock, Mesh
from meshcheck.topology import build_topology
from meshes import KUHN, LIMIT_RTOL, grid_hexes, grid_points, hex_box, tet_box

C = 343.0
needs_ngsolve = pytest.mark.skipif(not V.ngsolve_available(),
                                   reason='NGSolve not installed: pip install "meshcheck[verify]"')


# ------------------------------------------------------------------ meshes
def _wedges(n=(1, 1, 1), size=(1.0, 1.0, 1.0)) -> Mesh:
    h = grid_hexes(n)
    w = np.vstack([h[:, [0, 1, 2, 4, 5, 6]], h[:, [0, 2, 3, 4, 6, 7]]])
    return Mesh(grid_points(n, size), (CellBlock("wedge", w, np.ones(len(w))),), {1: "air"})


def _pyramids() -> Mesh:
    """A unit cube cut into 6 pyramids with apex at its centre."""
    hb = hex_box((1, 1, 1))
    pts = np.vstack([hb.points, hb.points.mean(axis=0)])
    faces = [(0, 3, 2, 1), (4, 5, 6, 7), (0, 1, 5, 4), (1, 2, 6, 5), (2, 3, 7, 6), (3, 0, 4, 7)]
    h = hb.blocks[0].cells[0]
    cells = np.array([list(h[list(f[::-1])]) + [8] for f in faces])  # base CCW from the apex
    return Mesh(pts, (CellBlock("pyramid", cells, np.ones(6)),), {1: "air"})


def _hex_wedge() -> Mesh:
    """Two cubes of hexahedra next to a cube split into two wedges (conforming)."""
    pts = grid_points((3, 1, 1), (3.0, 1.0, 1.0))
    h = grid_hexes((3, 1, 1))
    w = np.vstack([h[2:, [0, 1, 2, 4, 5, 6]], h[2:, [0, 2, 3, 4, 6, 7]]])
    return Mesh(pts, (CellBlock("hexahedron", h[:2], np.ones(2)),
                      CellBlock("wedge", w, np.ones(2))), {1: "air"})


def _graded_tets() -> Mesh:
    """Split bricks on a grid graded 1:8 in x, so the advised orders differ from cell to cell."""
    x = np.array([0.0, 0.05, 0.15, 0.35, 0.75])
    y = z = np.array([0.0, 0.2, 0.4])
    X, Y, Z = np.meshgrid(x, y, z, indexing="ij")
    pts = np.column_stack([X.ravel(), Y.ravel(), Z.ravel()])
    t = grid_hexes((4, 2, 2))[:, KUHN].reshape(-1, 4)
    return Mesh(pts, (CellBlock("tetra", t, np.ones(len(t))),), {1: "air"})


def _gmsh_tets(size=(0.6, 0.4, 0.3), h=0.12) -> Mesh:
    gmsh = pytest.importorskip("gmsh")
    gmsh.initialize(interruptible=False)
    try:
        gmsh.option.setNumber("General.Terminal", 0)
        gmsh.option.setNumber("General.NumThreads", 1)
        gmsh.option.setNumber("Mesh.RandomSeed", 1)
        gmsh.option.setNumber("Mesh.MeshSizeMin", h)
        gmsh.option.setNumber("Mesh.MeshSizeMax", h)
        gmsh.model.occ.addBox(0, 0, 0, *size)
        gmsh.model.occ.synchronize()
        gmsh.model.mesh.generate(3)
        tags, xyz, _ = gmsh.model.mesh.getNodes()
        _, nodes = gmsh.model.mesh.getElementsByType(4)
    finally:
        gmsh.finalize()
    idx = np.full(int(tags.max()) + 1, -1, np.int64)
    idx[tags.astype(np.int64)] = np.arange(len(tags))
    cells = idx[nodes.astype(np.int64)].reshape(-1, 4)
    return Mesh(xyz.reshape(-1, 3), (CellBlock("tetra", cells, np.ones(len(cells))),), {1: "air"})


TYPES = {"tetra": lambda: tet_box((1, 1, 1)), "hexahedron": lambda: hex_box((1, 1, 1)),
         "wedge": _wedges, "pyramid": _pyramids, "hex+wedge": _hex_wedge}
FEW = np.array([[1.0, 0, 0], [0, 1.0, 1.0], [-1.0, 1.0, 1.0]])  # axis, face and corner


# ------------------------------------------------------------ no solver needed
def test_cube_directions_are_the_26_neighbours():
    d = V.CUBE_DIRECTIONS
    assert d.shape == (26, 3)
    assert np.allclose(np.linalg.norm(d, axis=1), 1.0)
    nonzero = np.count_nonzero(np.abs(d) > 1e-12, axis=1)
    assert np.bincount(nonzero).tolist() == [0, 6, 12, 8]  # axes, face diagonals, corners
    assert np.allclose(np.sort(-d, axis=0), np.sort(d, axis=0))  # closed under d -> -d
    assert len(np.unique(np.round(d, 12), axis=0)) == 26


@pytest.mark.parametrize("kwargs", [
    {"directions": [[0.0, 0.0, 0.0]]}, {"directions": [[1.0, 0.0]]},
    {"source_distance": 0.0}, {"solver": "magic"}, {"error_order": 0}],
    ids=["zero-direction", "2d-direction", "source-inside", "solver", "quadrature"])
def test_settings_reject_bad_input(kwargs):
    with pytest.raises(SettingsError):
        V.VerifySettings(**kwargs)


def test_point_source_lies_outside_the_bounding_box():
    m = tet_box((2, 1, 1), size=(2.0, 1.0, 0.5))
    x0 = V.point_source_position(m, V.VerifySettings())
    lo, hi = m.bounding_box
    assert np.all(x0 > hi)


def test_verify_without_ngsolve_exits_2_with_the_install_hint(tmp_path, monkeypatch, capsys):
    m = hex_box((2, 1, 1))
    path = tmp_path / "box.vtu"
    meshio.write(path, meshio.Mesh(m.points, [("hexahedron", m.blocks[0].cells)]))
    monkeypatch.setattr(V, "ngsolve_available", lambda: False)
    assert main(["verify", str(path), "--units", "m", "-f", "100"]) == 2
    assert 'pip install "meshcheck[verify]"' in capsys.readouterr().err


def test_require_ngsolve_raises_solver_unavailable(monkeypatch):
    def missing(name):
        raise ImportError(name)

    monkeypatch.setattr(V.importlib, "import_module", missing)
    with pytest.raises(V.SolverUnavailable, match="meshcheck\\[verify\\]"):
        V.require_ngsolve()


# ------------------------------------------------------------ the 3D correction
def _limit(p, target, a, h, L):
    """1D model (meshcheck.dispersion) on an edge seen a times shorter: c t_max / (2 pi a h)."""
    return C * float(usable_kh(target, 12).max_kh(p, L / (a * h))) / (2 * np.pi * a * h)


def test_alignment_is_one_for_split_bricks_and_small_for_unstructured_tets():
    kuhn = tet_box((3, 2, 2))
    s = size_correction(kuhn, build_topology(kuhn), 8, 0.01).alignment["tetra"]
    assert s == pytest.approx(1.0)  # every brick's 6 tets share its 0-6 diagonal
    free = _gmsh_tets()
    assert 0.0 <= size_correction(free, build_topology(free), 8, 0.01).alignment["tetra"] < 0.25


@pytest.mark.parametrize("target", [0.01, 0.05])
@pytest.mark.parametrize("p", [1, 2, 4, 8])
def test_corrected_limit_is_the_1d_model_on_shorter_edges(p, target):
    # split bricks (alignment 1): every cell's longest edge is the brick diagonal h, seen as
    # a*h with a = the aligned table entry
    n, size = (4, 3, 3), (1.2, 0.9, 0.9)
    mesh = tet_box(n, size=size)
    topo = build_topology(mesh)
    adv = advise(mesh, topo, np.full(mesh.n_cells, C), 100.0,
                 AdviceSettings(target=target, max_order=8, correction_3d=True))
    plain = advise(mesh, topo, np.full(mesh.n_cells, C), 100.0,
                   AdviceSettings(target=target, max_order=8, correction_3d=False))
    h, L = np.sqrt(3) * 0.3, np.linalg.norm(size)
    a = SIZE_FACTOR_TABLE["tetra"][1][target][1][p - 1]
    assert np.allclose(adv.cell_limit[:, p - 1], _limit(p, target, a, h, L), rtol=LIMIT_RTOL)
    assert np.allclose(plain.cell_limit[:, p - 1], _limit(p, target, 1.0, h, L), rtol=LIMIT_RTOL)
    assert np.allclose(adv.cell_size, plain.cell_size)  # the true longest edge is reported


@pytest.mark.parametrize("target", [0.01, 0.05])
def test_hexahedra_use_their_row(target):
    mesh = hex_box((3, 2, 2), size=(0.9, 0.6, 0.6))
    topo = build_topology(mesh)
    adv = advise(mesh, topo, np.full(mesh.n_cells, C), 300.0, AdviceSettings(target=target, correction_3d=True))
    row = SIZE_FACTOR_TABLE["hexahedron"][1][target][0]
    L = np.linalg.norm((0.9, 0.6, 0.6))
    for p in (1, 2, 5):
        assert np.allclose(adv.cell_limit[:, p - 1], _limit(p, target, row[p - 1], 0.3, L))


def test_wedge_joining_edges_take_the_hexahedron_factor():
    # long wedges: the joining edges (1.0 m) govern, seen with the hexahedron factor
    mesh = _wedges((2, 2, 1), (0.2, 0.2, 1.0))
    topo = build_topology(mesh)
    adv = advise(mesh, topo, np.full(mesh.n_cells, C), 300.0, AdviceSettings(target=0.01, correction_3d=True))
    a = SIZE_FACTOR_TABLE["hexahedron"][1][0.01][0][2]
    L = np.linalg.norm((0.2, 0.2, 1.0))
    assert np.allclose(adv.cell_limit[:, 2], _limit(3, 0.01, a, 1.0, L))


def test_factor_is_log_linear_in_the_target_between_1_and_5_percent():
    mesh = tet_box((2, 2, 2))
    topo = build_topology(mesh)
    a1, a5 = (np.array(SIZE_FACTOR_TABLE["tetra"][1][t][1]) for t in (0.01, 0.05))
    w = np.log(2.0) / np.log(5.0)  # target 2 %
    (_, got), = size_correction(mesh, topo, 8, 0.02).classes
    assert np.allclose(got, a1 + w * (a5 - a1))
    (_, top), = size_correction(mesh, topo, 8, 0.3).classes  # above 5 %: the 5 % values
    assert np.allclose(top, a5)


# -------------------------------------------------------------- solver set-up
@needs_ngsolve
@pytest.mark.parametrize("name", list(TYPES))
def test_solver_mesh_is_the_same_mesh(name):
    ng = pytest.importorskip("ngsolve")
    mesh = TYPES[name]()
    topo = build_topology(mesh)
    sm = V.solver_mesh(mesh, topo)
    M = sm.ngmesh
    assert (M.ne, M.nedge, M.nface) == (mesh.n_cells, len(topo.edges), len(topo.faces))
    assert sm.n_boundary == int(np.count_nonzero(topo.faces.count == 1))
    volume = float(np.sum(topo.cell_volume))
    J = ng.specialcf.JacobianMatrix(3)
    # every element positively oriented in NGSolve (corner order maps are right)
    assert ng.Integrate(ng.IfPos(ng.Det(J), 1.0, 0.0), M, order=2) == pytest.approx(volume)
    # divergence theorem: int_boundary x.n ds = 3 V with outward normals, closed boundary
    n = ng.specialcf.normal(3)
    flux = ng.Integrate(ng.x * n[0] + ng.y * n[1] + ng.z * n[2], M, ng.BND, order=2)
    assert flux == pytest.approx(3 * volume, rel=1e-12)
    # element i has the corners of cell i
    start = 0
    for b in mesh.blocks:
        for j in (0, len(b) - 1):
            el = M[ng.ElementId(ng.VOL, start + j)]
            assert sorted(v.nr for v in el.vertices) == sorted(
                sm.vertex_of_node[b.cells[j, :b.info.n_corners]].tolist())
        start += len(b)


@needs_ngsolve
@pytest.mark.parametrize("name", ["tetra", "hexahedron", "wedge", "pyramid"])
def test_exact_plane_wave_reproduced_at_high_order(name):
    # k = 1 on a unit cube at order 8: a polynomial reproduces exp(i k d.x) to ~1e-10, so
    # anything above 1e-8 means the set-up (forms, Robin data, orders, error) is wrong
    mesh = TYPES[name]()
    sm = V.solver_mesh(mesh, build_topology(mesh))
    settings = V.VerifySettings(directions=FEW, source_distance=3.0)
    source = V.point_source_position(mesh, settings)
    s = V.solve_orders(sm, 1.0, np.full(mesh.n_cells, 8), settings, source)
    assert s.max_error < 1e-8
    assert s.point_error < 1e-6  # 1/r is analytic only up to the source: slower convergence


@needs_ngsolve
def test_error_converges_at_the_rate_of_the_order():
    # relative L2 error of a fixed plane wave ~ h^(p+1) (best approximation, small kh):
    # halving h at p = 2 divides it by ~8
    errs = []
    for n in (2, 4):
        mesh = hex_box((n, n, n))
        sm = V.solver_mesh(mesh, build_topology(mesh))
        s = V.solve_orders(sm, 2.0, np.full(mesh.n_cells, 2), V.VerifySettings(directions=FEW,
                                                                             point_source=False))
        errs.append(s.max_error)
    assert np.log2(errs[0] / errs[1]) == pytest.approx(3.0, abs=0.35)


@needs_ngsolve
@pytest.mark.parametrize("name", ["graded tets", "hex+wedge"])
def test_orders_in_the_solver_are_the_advised_orders(name):
    mesh = _graded_tets() if name == "graded tets" else _hex_wedge()
    topo = build_topology(mesh)
    f = 900.0 if name == "graded tets" else 300.0
    adv = advise(mesh, topo, np.full(mesh.n_cells, C), f, AdviceSettings(target=0.01))
    orders = V.advised_orders(adv)
    if name == "graded tets":
        assert len(np.unique(orders)) >= 3  # the test needs a spread of orders
    sm = V.solver_mesh(mesh, topo)
    fes = V.order_space(sm, orders)
    cell, edge, face = V.space_orders(fes, sm)
    assert np.array_equal(cell, orders)
    e_exp, f_exp = entity_orders(mesh, topo, orders)  # maximum rule
    assert np.array_equal(edge, e_exp) and np.array_equal(face, f_exp)
    # NGSolve's coupling unknowns are meshcheck.cost's condensed count
    want = variable_order_dofs(mesh, topo, adv.cell_limit, np.array([f]), 8)[0]
    assert fes.FreeDofs(coupling=True).NumSet() == want


@needs_ngsolve
@pytest.mark.parametrize("name,target,f", [("unstructured tets", 0.05, 500.0),
                                            ("unstructured tets", 0.01, 400.0),
                                            ("hexahedra", 0.01, 500.0)])
def test_advised_orders_meet_the_target(name, target, f):
    mesh = _gmsh_tets() if name == "unstructured tets" else hex_box((4, 3, 2), (0.8, 0.6, 0.4))
    topo = build_topology(mesh)
    adv = advise(mesh, topo, np.full(mesh.n_cells, C), f, AdviceSettings(target=target))
    assert adv.cell_order.max() >= 2
    v = V.verify(V.solver_mesh(mesh, topo), adv, V.VerifySettings(point_source=False))
    assert v.advised.dofs < 6000  # a small case
    assert v.advised.predicted <= target
    assert v.meets_target, (v.advised.max_error, target)
    top = int(V.advised_orders(adv).max())
    labels = [s.label for s in v.uniform]
    assert labels == ([f"uniform p={top}"] if np.any(V.advised_orders(adv) < top) else []) + \
        [f"uniform p={top - 1}"]
    assert v.uniform[-1].dofs < v.advised.dofs  # p - 1 everywhere is cheaper


@needs_ngsolve
def test_cli_verify_prints_a_table_and_writes_json(tmp_path, capsys):
    m = hex_box((3, 2, 2), (0.6, 0.4, 0.4))
    path = tmp_path / "box.vtu"
    meshio.write(path, meshio.Mesh(m.points, [("hexahedron", m.blocks[0].cells)]))
    out = tmp_path / "out"
    code = main(["verify", str(path), "--units", "m", "-f", "200", "--target", "0.05",
                 "--no-compare", "--out", str(out)])
    text = capsys.readouterr().out
    assert code == 0
    assert "advised" in text and "meet the target" in text
    doc = json.loads((out / "box.verify.json").read_text())
    assert doc["schema"] == "meshcheck-verify"
    (fr,) = doc["frequencies"]
    assert fr["frequency_hz"] == 200.0 and fr["meets_target"]
    assert len(fr["solves"][0]["errors"]) == 26
    assert fr["solves"][0]["max_error"] <= 0.05
