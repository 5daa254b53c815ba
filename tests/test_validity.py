"""Validity findings of meshcheck.validity."""
import numpy as np

from meshcheck.mesh import Mesh
from meshcheck.topology import build_topology
from meshcheck.validity import BLOCKING, check_validity, min_scaled_jacobian
from meshes import tet_box


def test_nonfinite_coordinates_are_found_at_used_nodes_only(kernel_mode):
    # a NaN at a node of the cells is blocking; an infinite coordinate at a node no cell
    # references is not a finding (the topology lists such nodes as unused)
    box = tet_box((3, 2, 2))
    pts = np.vstack([box.points, [[np.inf, 0.0, 0.0]]])
    used_bad = 5
    pts[used_bad, 1] = np.nan
    mesh = Mesh(pts, box.blocks, dim=3)
    topo = build_topology(mesh)
    assert topo.unused_nodes.tolist() == [len(pts) - 1]
    with np.errstate(invalid="ignore"):
        found = {f.code: f for f in check_validity(mesh, topo, min_scaled_jacobian(mesh))}
    f = found["nonfinite_coordinates"]
    assert f.severity == BLOCKING and f.count == 1 and f.ids.tolist() == [used_bad]
    # and none where every coordinate is finite
    clean = Mesh(np.vstack([box.points, [[9.0, 0.0, 0.0]]]), box.blocks, dim=3)
    topo = build_topology(clean)
    assert "nonfinite_coordinates" not in {
        f.code for f in check_validity(clean, topo, min_scaled_jacobian(clean))}
