"""Compiled kernels of the cost model (meshcheck/kernels/cost.py) against the numpy code
(MESHCHECK_KERNELS=numpy): the adjacency's face edges, star counts and faces per cell,
bit for bit (integers), on meshes of every volume cell kind, a mesh with a cell listed
twice (faces of three cells) and one with a collapsed cell; and the system counts built
on them against the brute-force pair count of test_cost.py."""
import numpy as np
import pytest

pytest.importorskip("numba")

from meshcheck.cost import build_adjacency, system_size  # noqa: E402
from meshcheck.mesh import CellBlock, Mesh  # noqa: E402
from meshcheck.topology import build_topology  # noqa: E402
from test_cost import MESHES, _brute_system, _listed_twice  # noqa: E402


def _collapsed() -> Mesh:
    m = MESHES["tet"]()
    cells = m.blocks[0].cells.copy()
    cells[0, 3] = cells[0, 2]
    return Mesh(m.points, (CellBlock("tetra", cells, m.blocks[0].region),))


CASES = {**{k: MESHES[k] for k in ("tet", "hex", "wedge", "pyramid", "hex+wedge")},
         "tet listed twice": lambda: _listed_twice(MESHES["tet"]()),
         "collapsed tet": _collapsed}


@pytest.mark.parametrize("name", list(CASES))
def test_adjacency_equals_the_numpy_code(monkeypatch, name):
    mesh = CASES[name]()
    topo = build_topology(mesh)
    got = {}
    for mode in ("numpy", "numba"):
        monkeypatch.setenv("MESHCHECK_KERNELS", mode)
        got[mode] = build_adjacency(mesh, topo)
    a, b = got["numpy"], got["numba"]
    for field in ("vertices", "chi_vertex", "chi_edge", "chi_face", "face_edges",
                  "face_corners", "face_tri", "cell_corners", "cell_kind", "cell_faces"):
        x, y = getattr(a, field), getattr(b, field)
        assert x.dtype == y.dtype and np.array_equal(x, y), field


@pytest.mark.parametrize("condensed", [True, False], ids=["condensed", "full"])
@pytest.mark.parametrize("name", ["tet", "hex", "wedge", "pyramid"])
def test_counts_on_the_compiled_adjacency_match_the_brute_force(monkeypatch, name,
                                                                  condensed):
    monkeypatch.setenv("MESHCHECK_KERNELS", "numba")
    mesh = CASES[name]()
    topo = build_topology(mesh)
    adj = build_adjacency(mesh, topo)
    rng = np.random.default_rng(3)
    for orders in (np.full(mesh.n_cells, 2), rng.integers(1, 5, mesh.n_cells)):
        got = system_size(mesh, topo, orders, condensed, adj)
        assert (got.ndof, got.nnz) == _brute_system(mesh, orders, condensed)
