"""Mesh: cell centroids on the numpy and compiled paths."""
import numpy as np
import pytest

from meshcheck.mesh import Mesh
from meshes import tet_box
from test_kernels_topology import MESHES


@pytest.mark.parametrize("name", sorted(MESHES))
def test_centroids_compiled_equal_numpy_and_the_corner_mean(name, monkeypatch):
    mesh = MESHES[name]()
    monkeypatch.setenv("MESHCHECK_KERNELS", "numpy")
    ref = Mesh(mesh.points, mesh.blocks).centroids
    monkeypatch.setenv("MESHCHECK_KERNELS", "numba")
    got = Mesh(mesh.points, mesh.blocks).centroids
    assert np.array_equal(got, ref)  # same summation order: bitwise
    # the definition: the mean of the corner nodes (np.mean, to rounding)
    want = np.concatenate([mesh.points[b.cells[:, :b.info.n_corners]].mean(axis=1)
                           for b in mesh.blocks])
    np.testing.assert_allclose(got, want, rtol=1e-14, atol=1e-14)


@pytest.mark.parametrize("tags", [[3, 1, 1, 7], [-5, 2, -5], [0], [10**9, -(10**9), 4], []])
def test_region_tags_equal_numpy_unique(tags):
    from meshcheck.mesh import CellBlock

    cells = np.zeros((len(tags), 4), np.int64)
    blocks = (CellBlock("tetra", cells, np.asarray(tags, np.int64)),) if tags else ()
    got = Mesh(np.zeros((4, 3)), blocks).region_tags
    assert got.dtype == np.int64 and np.array_equal(got, np.unique(np.asarray(tags, np.int64)))


@pytest.mark.parametrize("name", ["mixed", "random-1", "tetra10", "tet-box-7"])
def test_centroids_of_some_cells_equal_the_full_array(name, monkeypatch):
    mesh = MESHES[name]()
    ids = np.random.default_rng(3).integers(0, mesh.n_cells, 17)
    for path in ("numpy", "numba"):
        monkeypatch.setenv("MESHCHECK_KERNELS", path)
        m = Mesh(mesh.points, mesh.blocks)
        got = m.centroids_of(ids)
        assert "centroids" not in m.__dict__  # the few cells only, no full array
        assert np.array_equal(got, m.centroids[ids]), path
        with pytest.raises(IndexError):
            m.centroids_of([m.n_cells])


def test_cell_block_keeps_indices_and_tags_in_int32_when_they_fit():
    from meshcheck.mesh import CellBlock

    small = CellBlock("triangle", np.array([[0, 1, 2]], np.int64), np.array([7.0]))
    assert small.cells.dtype == np.int32 and small.region.dtype == np.int32
    assert small.cells.tolist() == [[0, 1, 2]] and small.region.tolist() == [7]
    # one index or tag past int32: the whole array stays int64, values unchanged
    big = CellBlock("triangle", np.array([[0, 1, 2**31]]), np.array([-2**31 - 1]))
    assert big.cells.dtype == np.int64 and big.cells[0, 2] == 2**31
    assert big.region.dtype == np.int64 and big.region[0] == -2**31 - 1
    edge = CellBlock("triangle", np.array([[0, 1, 2**31 - 1]], np.uint64), np.array([-2**31]))
    assert edge.cells.dtype == np.int32 and edge.cells[0, 2] == 2**31 - 1
    assert edge.region.dtype == np.int32 and edge.region[0] == -2**31
    empty = CellBlock("tetra", np.zeros((0, 4), np.int64), np.zeros(0))
    assert empty.cells.shape == (0, 4) and empty.cells.dtype == np.int32


def test_one_tag_per_block_is_held_as_a_read_only_broadcast():
    from meshcheck.mesh import CellBlock

    cells = np.zeros((5, 3), np.int64)
    one = CellBlock("triangle", cells, np.full(5, 4.0))        # float tags, as meshio gives
    assert one.region.strides == (0,) and not one.region.flags.writeable
    assert one.region.dtype == np.int32 and one.region.tolist() == [4] * 5
    big = CellBlock("triangle", cells, np.full(5, 2**40))       # past int32: int64 broadcast
    assert big.region.strides == (0,) and big.region.dtype == np.int64
    assert big.region.tolist() == [2**40] * 5
    again = CellBlock("triangle", cells, one.region)            # a broadcast stays one
    assert again.region.strides == (0,) and again.region.tolist() == [4] * 5
    mixed = CellBlock("triangle", cells, np.array([4, 4, 5, 4, 4]))
    assert mixed.region.strides == (4,) and mixed.region.tolist() == [4, 4, 5, 4, 4]
    mesh = Mesh(np.zeros((3, 3)), (one,))
    assert mesh.region is one.region
    assert mesh.region_tags.dtype == np.int64 and mesh.region_tags.tolist() == [4]
    two = Mesh(np.zeros((3, 3)), (one, CellBlock("triangle", cells, np.full(5, 9))))
    assert two.region.tolist() == [4] * 5 + [9] * 5 and two.region_tags.tolist() == [4, 9]


def test_topology_keeps_the_bounding_box_of_the_points_it_found_used(kernel_mode):
    # the topology hands its used-points mask to the mesh, which keeps the box from it
    # (no second pass over the cells): the same box as the mesh's own, which leaves out
    # the points no cell references
    from meshcheck.topology import build_topology

    box = tet_box((3, 2, 2))
    far = np.vstack([box.points, [[50.0, -7.0, 9.0]]])  # a point no cell references
    make = lambda: Mesh(far, box.blocks, dim=3)  # noqa: E731
    own = make().bounding_box
    assert own.tolist() == [[0.0, 0.0, 0.0], [1.0, 1.0, 1.0]]
    m = make()
    build_topology(m)
    assert "bounding_box" in m.__dict__ and np.array_equal(m.bounding_box, own)
