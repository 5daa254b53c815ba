"""Size field: gradation against closed forms and a brute-force relaxation, element
count against gmsh meshes of known count, the .pos view read back by gmsh."""
import math

import numpy as np
import pytest

from meshcheck.advice import AdviceSettings, advise
from meshcheck.cost import system_size
from meshcheck.mesh import CellBlock, Mesh
from meshcheck.sizefield import (GMSH_COUNT, REGULAR_TET, estimate_cells,
                                 limit_gradation, node_min, remesh, scenario_systems,
                                 size_field, write_pos)
from meshcheck.topology import build_topology
from meshes import hex_box, tet_box

BOX = (1.0, 0.8, 0.6)


def _gmsh_box(size: float, bgm: str | None = None) -> Mesh:
    """gmsh 4.15 Delaunay tets of BOX at a uniform size (or a background view)."""
    pytest.importorskip("gmsh")
    from meshcheck.gmsh_mesh import generate

    def build(gmsh):
        gmsh.model.occ.addBox(0, 0, 0, *BOX)
        gmsh.model.occ.synchronize()
        if bgm is None:
            gmsh.option.setNumber("Mesh.MeshSizeMin", size)
            gmsh.option.setNumber("Mesh.MeshSizeMax", size)
            return
        for k in ("Mesh.MeshSizeFromPoints", "Mesh.MeshSizeFromCurvature",
                  "Mesh.MeshSizeExtendFromBoundary"):
            gmsh.option.setNumber(k, 0)
        gmsh.merge(bgm)
        f = gmsh.model.mesh.field.add("PostView")
        gmsh.model.mesh.field.setNumber(f, "ViewTag", gmsh.view.getTags()[-1])
        gmsh.model.mesh.field.setAsBackgroundMesh(f)

    return generate(build, 3, name="gmsh")


# ---------------------------------------------------------------------------
# gradation


def test_gradation_along_a_row_is_the_closed_form():
    # a row of hexes along x: a small size at x = 0 grows linearly, h(x) = min(H, h0 + beta x)
    mesh = hex_box((20, 1, 1), size=(2.0, 0.1, 0.1))
    topo = build_topology(mesh)
    x = mesh.points[:, 0]
    h = np.full(mesh.n_points, 1.0)
    h[x == 0] = 0.01
    beta = 0.3
    out = limit_gradation(mesh, topo, h, beta)
    assert np.allclose(out, np.minimum(1.0, 0.01 + beta * x), rtol=1e-12)


def _relax(mesh, topo, h, beta):
    """Reference: Jacobi sweeps of h_i = min(h_i, h_j + beta |x_i - x_j|) over edges."""
    h = h.copy()
    a, b = topo.edges.nodes.T
    w = topo.edges.length
    while True:
        new = h.copy()
        np.minimum.at(new, a, h[b] + beta * w)
        np.minimum.at(new, b, h[a] + beta * w)
        if np.array_equal(new, h):
            return h
        h = new


@pytest.mark.parametrize("beta", [0.1, 0.3, 1.0])
def test_gradation_matches_relaxation_and_bounds_growth(beta):
    mesh = tet_box((5, 4, 3), size=(1.0, 0.8, 0.6))
    topo = build_topology(mesh)
    rng = np.random.default_rng(2)
    h = rng.uniform(0.02, 0.5, mesh.n_points)
    out = limit_gradation(mesh, topo, h, beta)
    assert np.allclose(out, _relax(mesh, topo, h, beta), rtol=1e-12)
    assert np.all(out <= h + 1e-15)
    a, b = topo.edges.nodes.T
    assert np.all(np.abs(out[a] - out[b]) <= beta * topo.edges.length * (1 + 1e-12))


def test_node_min_is_the_smallest_cell_value():
    mesh = tet_box((2, 2, 2))
    topo = build_topology(mesh)
    v = np.random.default_rng(1).uniform(1, 2, mesh.n_cells)
    got = node_min(mesh, topo, v)
    cells = mesh.blocks[0].cells
    for n in range(mesh.n_points):
        assert got[n] == v[np.any(cells == n, axis=1)].min()


# ---------------------------------------------------------------------------
# element count against gmsh


def _gmsh_rectangle_count(size: float) -> int:
    gmsh = pytest.importorskip("gmsh")
    gmsh.initialize(interruptible=False)
    try:
        gmsh.option.setNumber("General.Terminal", 0)
        gmsh.option.setNumber("Mesh.Algorithm", 6)
        gmsh.option.setNumber("Mesh.MeshSizeMin", size)
        gmsh.option.setNumber("Mesh.MeshSizeMax", size)
        gmsh.model.occ.addRectangle(0, 0, 0, 1.0, 0.8)
        gmsh.model.occ.synchronize()
        gmsh.model.mesh.generate(2)
        et = gmsh.model.mesh.getElementType("triangle", 1)
        return len(gmsh.model.mesh.getElementsByType(et)[0])
    finally:
        gmsh.finalize()


@pytest.mark.parametrize("h", [0.12, 0.06, 0.04])
def test_estimated_count_matches_uniform_gmsh_mesh(h):
    # N = a V 6 sqrt(2) / h^3 + b S / h^2: regular tetrahedra (edge h, volume h^3/(6 sqrt2))
    # plus a boundary layer; (a, b) measured with gmsh 4.15 on other sizes (0.2 .. 0.025 m)
    field_mesh = tet_box((4, 4, 3), size=BOX)
    topo = build_topology(field_mesh)
    est = estimate_cells(field_mesh, topo, np.full(field_mesh.n_points, h))
    a, b = GMSH_COUNT[3]
    area = 2 * (BOX[0] * BOX[1] + BOX[0] * BOX[2] + BOX[1] * BOX[2])
    assert est == pytest.approx(a * REGULAR_TET * 0.48 / h ** 3 + b * area / h ** 2, rel=1e-12)
    assert est == pytest.approx(_gmsh_box(h).n_cells, rel=0.1)


@pytest.mark.parametrize("h", [0.08, 0.03])
def test_estimated_count_2d_matches_uniform_gmsh_mesh(h):
    # regular triangles (area sqrt(3) h^2 / 4) plus a boundary term, gmsh Frontal-Delaunay
    from test_cost import tri_square

    sq = tri_square((5, 4))
    pts = sq.points * np.array([1.0, 0.8, 0.0])
    mesh = Mesh(pts, sq.blocks, sq.region_names, 2, "rect", "m")
    topo = build_topology(mesh)
    est = estimate_cells(mesh, topo, np.full(mesh.n_points, h))
    a, b = GMSH_COUNT[2]
    assert est == pytest.approx(a * 0.8 * 4 / math.sqrt(3) / h ** 2 + b * 3.6 / h, rel=1e-12)
    assert est == pytest.approx(_gmsh_rectangle_count(h), rel=0.1)


def test_pos_view_is_read_by_gmsh_as_background_size(tmp_path):
    # a graded field h = 0.05 + 0.1 x written as a .pos view drives gmsh's mesh: the
    # count matches the estimate, and gmsh probes the view to the same values
    gmsh = pytest.importorskip("gmsh")
    mesh = tet_box((6, 5, 4), size=BOX)
    topo = build_topology(mesh)
    h = 0.05 + 0.1 * mesh.points[:, 0]
    pos = write_pos(tmp_path / "size.pos", mesh, h)
    gmsh.initialize(interruptible=False)
    try:
        gmsh.option.setNumber("General.Terminal", 0)
        gmsh.merge(str(pos))
        tag = gmsh.view.getTags()[-1]
        for x in (0.1, 0.45, 0.93):
            val = gmsh.view.probe(tag, x, 0.37, 0.21)[0][0]
            assert val == pytest.approx(0.05 + 0.1 * x, rel=1e-4)
    finally:
        gmsh.finalize()
    est = estimate_cells(mesh, topo, h)
    assert _gmsh_box(0.0, str(pos)).n_cells == pytest.approx(est, rel=0.1)


def test_pos_in_millimetres_scales_coordinates_and_values(tmp_path):
    mesh = tet_box((1, 1, 1))
    pos = write_pos(tmp_path / "s.pos", mesh, np.full(mesh.n_points, 0.02), scale=1e-3)
    first = pos.read_text().splitlines()[1]
    assert first.startswith("SS(") and first.endswith("{20,20,20,20};")
    assert "1000" in first


def _pos_reference(mesh, values, scale=1.0) -> str:
    """The .pos text formatted number by number (the plain way the fast writer replaces)."""
    kinds = {"tetra": "SS", "hexahedron": "SH", "wedge": "SI", "pyramid": "SY"}
    lines = []
    for b in mesh.blocks:
        for cell in b.cells[:, :b.info.n_corners]:
            v = np.asarray(values)[cell] / scale
            if not np.all(np.isfinite(v)):
                continue
            xyz = ",".join("%.8g" % x for x in (mesh.points[cell] / scale).ravel())
            lines.append(f"{kinds[b.info.linear]}({xyz}){{{','.join('%.5g' % x for x in v)}}};")
    return 'View "target_size" {\n' + "".join(ln + "\n" for ln in lines) + "};\n"


@pytest.mark.parametrize("scale", [1.0, 1e-3])
def test_pos_writer_equals_number_by_number_formatting(tmp_path, scale):
    # mixed hexes and tets, irrational coordinates, a nan node: the fast byte assembly
    # gives the same text as formatting every number in turn; cells on the nan node drop
    hexes, tets = hex_box((3, 2, 2), size=(0.7, 0.3, 0.2)), tet_box((2, 2, 2), origin=(1, 0, 0))
    pts = np.vstack([hexes.points, tets.points]) * np.pi
    mesh = Mesh(pts, (CellBlock("hexahedron", hexes.blocks[0].cells, np.ones(hexes.n_cells, np.int64)),
                      CellBlock("tetra", tets.blocks[0].cells + len(hexes.points),
                                np.ones(tets.n_cells, np.int64))))
    vals = 0.01 + np.random.default_rng(3).random(len(pts)) / 7
    vals[len(hexes.points) + 5] = np.nan
    pos = write_pos(tmp_path / "v.pos", mesh, vals, scale=scale, chunk=7)
    assert pos.read_text() == _pos_reference(mesh, vals, scale)


def test_pos_written_past_the_page_cache_is_the_same_text(tmp_path, monkeypatch):
    # a large view goes through meshcheck.bulkfile's direct writes (here: any size, 4 KiB
    # at a time): the text of number-by-number formatting all the same
    from meshcheck import bulkfile
    monkeypatch.setattr(bulkfile, "DIRECT_MIN_BYTES", 0)
    monkeypatch.setattr(bulkfile, "BUFFER_BYTES", 4096)
    calls = []
    real = bulkfile._direct_write
    monkeypatch.setattr(bulkfile, "_direct_write", lambda fd, mv: calls.append(1) or real(fd, mv))
    mesh = tet_box((4, 3, 3), size=(0.7, 0.3, 0.2))
    vals = 0.01 + np.random.default_rng(4).random(mesh.n_points) / 7
    pos = write_pos(tmp_path / "d.pos", mesh, vals, scale=1e-3, chunk=50)
    assert pos.read_text() == _pos_reference(mesh, vals, 1e-3)
    if bulkfile.supports_direct(tmp_path):
        assert len(calls) == pos.stat().st_size // 4096


def test_scenario_sums_equal_a_pass_per_frequency():
    # the sorted step sums of scenario_systems against the plain loop over frequencies
    from meshcheck.sizefield import GMSH_TET_RATIOS, _scenario_terms, _step_sums

    rng = np.random.default_rng(7)
    thr = np.sort(rng.uniform(50, 3000, (500, 6)), axis=1)
    thr[::37, 3:] = np.inf
    thr[::53, 4:] = np.nan  # never below a frequency
    w = rng.uniform(0.5, 2.0, 500)
    # unsorted, ties with thresholds, a repeated frequency
    f = np.concatenate([rng.uniform(10, 4000, 40), thr[:5, 2], thr[:1, 2]])
    terms = _scenario_terms(GMSH_TET_RATIOS)
    fast = _step_sums(thr, w, f, terms)
    for i, fi in enumerate(f):
        q = 1 + np.count_nonzero(thr < fi, axis=1)
        for g, got in zip(terms, fast):
            assert got[i] == pytest.approx(np.sum(w * g(q)), rel=1e-12)


# ---------------------------------------------------------------------------
# the size field of an audit


def _advice(mesh, fmax, order=None, max_order=4):
    topo = build_topology(mesh)
    s = AdviceSettings(target=0.01, max_order=max_order, order=order)
    return topo, advise(mesh, topo, np.full(mesh.n_cells, 343.0), fmax, s)


def test_size_field_is_the_graded_cell_target():
    mesh = tet_box((6, 5, 4), size=BOX)
    topo, adv = _advice(mesh, 800.0)
    sf = size_field(mesh, topo, adv, gradation=0.3)
    raw = node_min(mesh, topo, adv.target_size)
    assert np.allclose(sf.target, raw)
    assert np.allclose(sf.size, limit_gradation(mesh, topo, np.minimum(raw, node_min(
        mesh, topo, topo.cell_extent())), 0.3))
    assert np.allclose(sf.mesher_size, sf.size / 2.0)
    assert sf.order == 4


@pytest.mark.parametrize("kernels", ["numpy", "numba"])
@pytest.mark.parametrize("case", ["tet", "tet10", "unused node", "h_max"])
def test_one_cap_skips_its_node_minimum(monkeypatch, kernels, case):
    # one part (the cap a broadcast extent) or an h_max: the cap at the nodes is that value
    # at every node of a cell (tetra10 mid-nodes too), the same field as the minimum over
    # the cells of a full array of it (the general path); a node of no cell stays nan
    if kernels == "numba":
        pytest.importorskip("numba")
    from meshcheck import topology as T
    from meshes import tet10_box

    mesh = tet10_box((3, 3, 2), size=BOX) if case == "tet10" else tet_box((6, 5, 4), size=BOX)
    if case == "unused node":
        mesh = Mesh(np.vstack([mesh.points, [[9.0, 9.0, 9.0]]]), mesh.blocks)
    topo, adv = _advice(mesh, 800.0)
    h_max = 0.05 if case == "h_max" else None  # binds: below the targets here
    monkeypatch.setenv("MESHCHECK_KERNELS", kernels)
    one = size_field(mesh, topo, adv, h_max=h_max)
    extent = topo.cell_extent()
    assert extent.strides == (0,)
    full = np.full(mesh.n_cells, h_max if h_max else extent[0])
    monkeypatch.setattr(T.Topology, "cell_extent", lambda self: full)
    ref = size_field(mesh, topo, adv, h_max=None)
    for name in ("target", "size", "mesher_size", "current"):
        np.testing.assert_array_equal(getattr(one, name), getattr(ref, name), err_msg=name)
    assert np.isnan(one.size[-1]) == (case == "unused node")
    assert (case == "h_max") == bool((one.size < one.target - 1e-12).any())


def test_chosen_order_gives_smaller_sizes_and_geometry_hook_applies():
    mesh = tet_box((6, 5, 4), size=BOX)
    topo, adv = _advice(mesh, 800.0)
    p4 = size_field(mesh, topo, adv)
    p2 = size_field(mesh, topo, adv, order=2)
    assert np.all(p2.target < p4.target)
    corner = np.argmin(np.linalg.norm(mesh.points, axis=1))

    def limit(m, t):
        g = np.full(m.n_points, np.inf)
        g[corner] = 0.01
        return g

    lim = size_field(mesh, topo, adv, geometry_limit=limit, gradation=0.2)
    assert lim.size[corner] == pytest.approx(0.01)
    d = np.linalg.norm(mesh.points - mesh.points[corner], axis=1)
    assert np.all(lim.size <= 0.01 + 0.2 * d * np.sqrt(3) + 1e-12)


@pytest.mark.parametrize("p", [1, 2, 3])
def test_scenario_counts_match_a_gmsh_mesh_built_to_the_field(p):
    # fixed order p on a gmsh mesh of size h: exact counts vs the scenario estimate
    mesh = tet_box((5, 4, 3), size=BOX)
    topo, adv = _advice(mesh, 300.0, order=p, max_order=p)
    sf = size_field(mesh, topo, adv)
    h = 0.07
    sf = type(sf)(sf.order, sf.fmax, sf.gradation, sf.edge_factor, sf.target, sf.geometry,
                  np.full(mesh.n_points, 2 * h), np.full(mesh.n_points, h), sf.current,
                  estimate_cells(mesh, topo, np.full(mesh.n_points, h)))
    systems, n_cells = scenario_systems(mesh, topo, adv, sf, [300.0], p, fixed_order=p)
    g = _gmsh_box(h)
    exact = system_size(g, build_topology(g), p, True)
    assert n_cells == pytest.approx(g.n_cells, rel=0.1)
    assert systems[0].ndof == pytest.approx(exact.ndof, rel=0.15)
    assert systems[0].nnz == pytest.approx(exact.nnz, rel=0.15)


def test_remesh_with_gmsh_follows_the_field(tmp_path):
    from meshcheck.reading import read_mesh

    mesh = tet_box((6, 5, 4), size=BOX)
    topo, adv = _advice(mesh, 500.0)
    sf = size_field(mesh, topo, adv)
    h = np.full(mesh.n_points, 0.09)
    sf = type(sf)(sf.order, sf.fmax, sf.gradation, sf.edge_factor, sf.target, sf.geometry,
                  2 * h, h, sf.current, lambda: estimate_cells(mesh, topo, h))
    out = remesh(mesh, topo, sf, tmp_path / "coarse.msh")
    new = read_mesh(out, "m")
    vol = np.abs(build_topology(new).cell_volume).sum()
    assert vol == pytest.approx(0.48, rel=1e-9)
    assert new.n_cells == pytest.approx(sf.cells_estimate, rel=0.15)


# ---------------------------------------------------------------------------
# audit outputs and the coarsen command


def test_audit_reports_carry_the_size_field(tmp_path):
    import meshio

    from meshcheck.cost import audit_job_cost
    from meshcheck.pipeline import AuditSettings, audit
    from meshcheck.report import to_dict, write_all

    mesh = tet_box((6, 5, 4), size=BOX)
    res = audit(mesh, AuditSettings((200.0, 400.0, 800.0), AdviceSettings(max_order=4),
                                    speed=343.0))
    files = write_all(res, tmp_path, "box")
    field = audit_job_cost(res).coarsening.field
    vtu = meshio.read(files["vtu"])
    assert np.allclose(vtu.point_data["target_size"], field.size, rtol=1e-6)
    assert np.allclose(vtu.point_data["mesher_size"], field.size / 2, rtol=1e-6)
    assert files["size_view"].read_text().startswith('View "mesher_size" {')
    cost = to_dict(res)["cost"]
    assert [q["strategy"] for q in cost["strategies"]] == ["variable p<=4", "fixed p=1",
                                                           "fixed p=2"]
    assert cost["coarsening"]["order"] == 4
    assert cost["strategies"][0]["unknowns"] == res.sweep.dofs.tolist()


def test_coarsen_command_remeshes_and_audits(tmp_path):
    import json

    from meshcheck.cli import main

    mesh = tet_box((10, 8, 6), size=BOX)
    import meshio
    meshio.write(tmp_path / "box.vtu", meshio.Mesh(mesh.points, [("tetra", mesh.blocks[0].cells)]))
    rc = main(["coarsen", str(tmp_path / "box.vtu"), "--units", "m", "--fmax", "800",
               "--max-order", "4", "--out", str(tmp_path / "out"), "--quiet"])
    summary = json.loads((tmp_path / "out" / "box.coarsen.json").read_text())
    assert rc == 0 and summary["coarsened_verdict"]["ready"]
    assert summary["coarsened_cells"] < summary["supplied_cells"]
    # a remesh that misses the upper frequency is redone with the mesher size scaled by
    # `shrink` < 1, which multiplies the count by shrink^-3
    est = summary["estimated"]["coarsening"]["estimated_cells"]
    shrink = summary["mesher_size_shrink"]
    assert 0.8 < shrink <= 1.0
    assert summary["coarsened_cells"] == pytest.approx(est / shrink ** 3, rel=0.2)


# ---------------------------------------------------------------------------
# the 3D correction in the size field and the coarsening scenario

def _first_crossing(p, r, tau):
    """Largest kh of the 1D model (first crossing of the target), by scan + brentq."""
    from scipy.optimize import brentq

    from meshcheck.dispersion import predicted_error
    t = np.linspace(1e-3, 4 * p + 8, 40000)
    i = int(np.argmax(predicted_error(t, p, t * r) - tau > 0))
    return brentq(lambda x: float(predicted_error(x, p, x * r) - tau), t[i - 1], t[i])


@pytest.mark.parametrize("correction", [True, False], ids=["default", "plain"])
@pytest.mark.parametrize("order", [1, 3])
def test_target_size_at_another_order_meets_the_corrected_1d_model(order, correction):
    # on hexes the factor is the table's hexahedron row (docs/validation.md); the target
    # size h_t solves predicted_error(k a h_t, p, k L) = target (the 1D model's definition)
    from meshcheck.advice import SIZE_FACTOR_TABLE
    from meshcheck.dispersion import predicted_error
    from meshcheck.sizefield import cell_target_size

    mesh = hex_box((6, 4, 3), size=BOX)
    topo = build_topology(mesh)
    adv = advise(mesh, topo, np.full(mesh.n_cells, 343.0), 800.0,
                 AdviceSettings(target=0.01, max_order=4, correction_3d=correction))
    h_t = cell_target_size(adv, order, mesh, topo)
    a = SIZE_FACTOR_TABLE["hexahedron"][1][0.01][0][order - 1] if correction else 1.0
    k, L = 2 * np.pi * 800.0 / 343.0, np.linalg.norm(BOX)
    assert np.allclose(h_t, h_t[0])
    assert float(predicted_error(k * a * h_t[0], order, k * L)) == pytest.approx(0.01, rel=2e-3)


def test_scenario_orders_follow_the_free_tetrahedron_factors():
    # a uniform field h: every new cell takes the lowest p whose limit
    # c (kh)_max(p, L/(a_p h)) / (2 pi a_p h) reaches f, a_p the free tetrahedron row at 1 %
    from meshcheck.advice import SIZE_FACTOR_TABLE
    from meshcheck.sizefield import GMSH_TET_RATIOS

    mesh = tet_box((5, 4, 3), size=BOX)
    topo, adv = _advice(mesh, 300.0, max_order=4)
    sf = size_field(mesh, topo, adv)
    h = 0.1
    sf = type(sf)(sf.order, sf.fmax, sf.gradation, sf.edge_factor, sf.target, sf.geometry,
                  np.full(mesh.n_points, h), np.full(mesh.n_points, h / 2), sf.current,
                  estimate_cells(mesh, topo, np.full(mesh.n_points, h / 2)))
    a = SIZE_FACTOR_TABLE["tetra"][1][0.01][0]
    L = float(topo.component_extent[0])
    limit = [343.0 * _first_crossing(p, L / (a[p - 1] * h), 0.01) / (2 * np.pi * a[p - 1] * h)
             for p in range(1, 5)]
    f = np.array([0.5 * limit[0], 0.5 * (limit[0] + limit[1]), 0.5 * (limit[1] + limit[2]),
                  0.5 * (limit[2] + limit[3])])
    systems, n_cells = scenario_systems(mesh, topo, adv, sf, f, 4, ratios=GMSH_TET_RATIOS)
    per_cell = np.array([s.ndof for s in systems]) / n_cells
    # (counts are rounded to whole unknowns)
    np.testing.assert_allclose(per_cell, GMSH_TET_RATIOS.ndof(np.arange(1, 5)), rtol=1e-4)


def test_cells_estimate_is_worked_out_once_and_only_when_asked_for(monkeypatch):
    # only the cost quote reads it: the VTU and the gmsh view need not pay for it
    from meshcheck import sizefield

    mesh = tet_box((4, 3, 3), size=BOX)
    topo, adv = _advice(mesh, 500.0)
    calls = []
    monkeypatch.setattr(sizefield, "estimate_cells",
                        lambda *a: calls.append(1) or estimate_cells(*a))
    sf = size_field(mesh, topo, adv)
    assert calls == []
    first = sf.cells_estimate
    assert sf.cells_estimate == first == estimate_cells(mesh, topo, sf.mesher_size) > 0
    assert calls == [1]
