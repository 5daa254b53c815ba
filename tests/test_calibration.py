"""Fits recover known exponents and coefficients; measurements against closed forms;
a small real calibration end to end."""
import json
import math

import numpy as np
import pytest
from scipy import sparse

from meshcheck.calibration import (Fit, MachineModel, default_machine_path, fit_machine,
                                   fit_power, fit_terms, load_machine, measure,
                                   measure_factorisation, regressors, save_machine, submesh,
                                   to_ngsolve)
from meshcheck.errors import SettingsError
from meshcheck.topology import build_topology
from meshes import hex_box, tet_box
from test_cost import mixed_hex_wedge, pyramid_box, quad_square, tri_square, wedge_box

RNG = np.random.default_rng(42)


# ---------------------------------------------------------------------------
# fits on synthetic data


@pytest.mark.parametrize("exponent", [1.0, 4.0 / 3.0, 1.5, 2.0])
def test_fit_power_recovers_exponent(exponent):
    # nested dissection: fill ~ N^(4/3), flops ~ N^2 (3D); N^(3/2) flops in 2D
    N = np.geomspace(1e3, 1e6, 25)
    y = 3.7 * N ** exponent * np.exp(RNG.normal(0, 0.05, len(N)))
    e, c = fit_power(N, y)
    assert e == pytest.approx(exponent, abs=0.02)
    assert c == pytest.approx(3.7, rel=0.3)


@pytest.mark.parametrize("dim,kind", [(3, "memory"), (3, "work"), (2, "memory"), (2, "work")])
def test_fit_terms_recovers_coefficients(dim, kind):
    N = np.geomspace(500, 5e5, 30)
    Z = N * RNG.uniform(10, 300, len(N))
    X = regressors(kind, dim, N, Z)
    # positive leading terms, a small truncation term (columns named "-..." enter negated)
    true = np.array([2.5e-1, 7.0, 3e-3, 1e-2][:len(X)])
    y = sum(c * v for c, v in zip(true, X.values()))
    assert np.all(y > 0)
    fit = fit_terms(X, y)
    assert np.allclose(fit.coef, true, rtol=1e-6)
    assert fit.log_sd < 1e-8
    assert np.allclose(fit.predict(X), y, rtol=1e-9)


def test_fit_spread_is_the_noise():
    N = np.geomspace(500, 5e5, 400)
    Z = 40 * N
    X = regressors("memory", 3, N, Z)
    y = (0.8 * X["N^(4/3)"] + 3 * Z + 0.5 * X["-N"]) * np.exp(RNG.normal(0, 0.2, len(N)))
    fit = fit_terms(X, y)
    assert fit.log_sd == pytest.approx(0.2, rel=0.15)
    lo, hi = fit.band(1.0)
    assert hi / lo == pytest.approx(math.exp(4 * fit.log_sd))


def test_fit_terms_refuses_too_few_samples():
    with pytest.raises(SettingsError):
        fit_terms({"a": np.ones(1), "b": np.ones(1)}, np.ones(1))


def test_nested_dissection_regressors():
    N, Z = np.array([8.0, 1000.0]), np.array([64.0, 2e4])
    assert np.allclose(regressors("memory", 3, N, Z)["N^(4/3)"], [16.0, 1e4])
    assert np.allclose(regressors("memory", 2, N, Z)["N log2 N"], [24.0, 1000 * math.log2(1000)])
    assert np.allclose(regressors("work", 3, N, Z)["N^2"], [64.0, 1e6])
    assert np.allclose(regressors("work", 2, N, Z)["N^(3/2)"], [8.0 ** 1.5, 1000 ** 1.5])
    assert np.allclose(regressors("work", 3, N, Z)["nnz^2/N"], [512.0, 4e5])


# ---------------------------------------------------------------------------
# measurements against closed forms


def test_tridiagonal_factorisation_has_no_fill():
    # a path graph: minimum degree eliminates without fill, L + U - N = 3N - 2 entries,
    # one multiply-add and one division per pivot: 3 (N - 1) operations
    n = 400
    A = sparse.diags([-1.0, 4.0 + 1j, -1.0], [-1, 0, 1], shape=(n, n), format="csc")
    r = measure_factorisation(A)
    assert r["fill"] == 3 * n - 2
    assert r["flops"] == 3 * (n - 1)
    assert r["factor_s"] >= 0 and r["solve_s"] >= 0


def test_dense_factorisation_operation_count():
    # dense n x n: L + U - N = n^2 entries, sum_j (2 j^2 + j) operations, j = 0..n-1
    n = 40
    A = RNG.normal(size=(n, n)) + 1j * RNG.normal(size=(n, n)) + 4 * n * np.eye(n)
    r = measure_factorisation(sparse.csc_matrix(A))
    j = np.arange(n)
    assert r["fill"] == n * n
    assert r["flops"] == float(np.sum(2 * j ** 2 + j))


# ---------------------------------------------------------------------------
# machine constants


def test_shipped_constants_cover_both_dimensions_and_assembly():
    m = MachineModel.from_json(json.loads(default_machine_path().read_text()), "shipped")
    for q in ("fill", "factor_bytes", "solve_s", "flops", "factor_s"):
        for dim in (2, 3):
            f = m.fit(q, dim)
            assert f.n >= 5 and all(c >= 0 for c in f.coef) and any(c > 0 for c in f.coef)
    assert m.fit("assembly_s").n >= 5
    pr = m.predict(3, [1e4, 1e5], [1e6, 1e7], [1e3, 1e4], [1e5, 1e6], [1e6, 1e7])
    assert np.all(np.diff(pr.factor_s) > 0) and np.all(np.diff(pr.factor_bytes) > 0)


def test_machine_json_round_trip_and_lookup(tmp_path, monkeypatch):
    fits = {"fill3": Fit(("N^(4/3)", "nnz"), (1.0, 2.0), 0.1, 0.2, 9)}
    m = MachineModel("s", {"cpu": "x"}, "2025", fits, {"fill3": {"1": 1.3}})
    path = save_machine(m, tmp_path / "m.json")
    back = load_machine(path)
    assert back.fits == m.fits and back.exponents == m.exponents
    monkeypatch.setenv("MESHCHECK_MACHINE", str(path))
    assert load_machine().source == str(path)
    (tmp_path / "bad.json").write_text("{}")
    with pytest.raises(SettingsError):
        load_machine(tmp_path / "bad.json")
    with pytest.raises(SettingsError):
        back.fit("factor_s", 3)


def test_submesh_is_a_connected_piece():
    mesh = tet_box((6, 5, 4))
    topo = build_topology(mesh)
    sub = submesh(mesh, topo, 100, seed_cell=0)
    t = build_topology(sub)
    assert sub.n_cells == 100 and t.n_components == 1
    assert len(t.unused_nodes) == 0


UNIT_MESHES = {"tetra": lambda: tet_box((2, 2, 2)), "hexahedron": lambda: hex_box((2, 2, 2)),
               "wedge": wedge_box, "pyramid": pyramid_box, "hex+wedge": mixed_hex_wedge,
               "triangle": tri_square, "quad": quad_square}


@pytest.mark.parametrize("name", list(UNIT_MESHES))
def test_ngsolve_mesh_is_positively_oriented(name):
    # the meshes the calibration assembles on: every cell maps from NGSolve's reference
    # element with det J > 0, so the measure where det J > 0 is the whole unit cube or
    # square (a tetrahedron handed over in meshio/VTK order would be inverted: NGSolve's
    # reference tetrahedron is (1,0,0) (0,1,0) (0,0,1) (0,0,0))
    ng = pytest.importorskip("ngsolve")
    mesh = UNIT_MESHES[name]()
    M = to_ngsolve(mesh)
    assert M.ne == mesh.n_cells
    J = ng.specialcf.JacobianMatrix(mesh.dim)
    # one inverted cell would remove 1/48 or more; NGSolve's pyramid map is singular at
    # the apex, where its quadrature loses ~1e-10
    assert ng.Integrate(ng.IfPos(ng.Det(J), 1.0, 0.0), M, order=2) == pytest.approx(1.0,
                                                                                    rel=1e-9)


def test_small_calibration_end_to_end():
    # real NGSolve assembly + SuperLU factorisations; the counts of the assembled matrix
    # are checked against meshcheck's exact counts inside `measure`
    mesh = tet_box((6, 6, 5))
    topo = build_topology(mesh)
    samples = []
    for p, cells in [(1, 700), (1, 1080), (2, 60), (2, 150), (2, 300), (3, 40), (3, 90),
                     (3, 160)]:
        samples.append(measure(submesh(mesh, topo, cells), p, topo=None))
    model = fit_machine(samples)
    for s in samples:
        # the factors hold the pattern of A (no cancellation in these matrices)
        assert s.fill >= s.nnz and s.flops > s.fill - s.ndof and s.factor_s > 0
    # the nested-dissection form (N^(4/3) + nnz) describes these exact factor sizes well
    assert model.fit("fill", 3).log_sd < 0.3
    assert model.fit("factor_s", 3).n == len(samples)


# ---------------------------------------------------------------------------
# nested dissection


def _vertex_incidence(mesh):
    c = mesh.blocks[0].cells
    rows = c.ravel()
    cols = np.repeat(np.arange(len(c)), c.shape[1])
    return sparse.csr_matrix((np.ones(len(rows)), (rows, cols)), shape=(mesh.n_points, len(c)))


def test_nested_dissection_of_a_row_is_the_postorder_of_the_cuts():
    # 8 hexes in a row, leaves of 1 cell: cuts at x = 4, then 2 and 6, then 1, 3, 5, 7.
    # Vertices at x = 0 / 8 belong to the end cells only; every other x is the separator
    # of a cut.  Postorder (halves before their separator): 0, 1, 3, 2, 5, 8, 7, 6, 4.
    from meshes import hex_box
    from meshcheck.calibration import nested_dissection

    mesh = hex_box((8, 1, 1), size=(8.0, 1.0, 1.0))
    perm = nested_dissection(mesh.centroids, _vertex_incidence(mesh), leaf=1)
    assert sorted(perm.tolist()) == list(range(mesh.n_points))
    x = mesh.points[perm, 0]
    assert x[::4].tolist() == [0, 1, 3, 2, 5, 8, 7, 6, 4]
    assert all(len(set(x[i:i + 4])) == 1 for i in range(0, len(x), 4))


def test_nested_dissection_cuts_fill_of_a_3d_grid():
    # George (1973): dissection orders beat the banded natural order on grids
    from meshes import hex_box
    from meshcheck.calibration import nested_dissection

    mesh = hex_box((9, 9, 9))
    topo = build_topology(mesh)
    from meshcheck.cost import system_size
    c = mesh.blocks[0].cells
    rows, cols = np.repeat(c, 8, axis=1).ravel(), np.tile(c, (1, 8)).ravel()
    A = sparse.csc_matrix((np.ones(len(rows)), (rows, cols)), shape=(mesh.n_points,) * 2)
    A = A + 30 * sparse.identity(mesh.n_points, format="csc")
    assert A.nnz == system_size(mesh, topo, 1).nnz
    nd = measure_factorisation(A, nested_dissection(mesh.centroids, _vertex_incidence(mesh)))
    natural = measure_factorisation(A)
    assert nd["fill"] < 0.8 * natural["fill"]
    assert nd["flops"] < 0.6 * natural["flops"]


def test_calibrate_command_writes_loadable_constants(tmp_path):
    from meshcheck.cli import main

    out = tmp_path / "m.json"
    rc = main(["calibrate", "--max-dofs", "1200", "--steps", "4", "--orders", "1,2",
               "--out", str(out), "--quiet"])
    assert rc == 0
    m = load_machine(out)
    for dim in (2, 3):
        assert m.fit("factor_s", dim).n == 8 and m.fit("fill", dim).log_sd < 0.5
        assert m.largest_calibrated(dim) >= 800
    assert m.fit("assembly_s").n >= 8
    assert m.solver.startswith("scipy.sparse.linalg.splu")
