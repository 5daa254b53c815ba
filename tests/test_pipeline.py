"""The audit pipeline: overlapping stages give the serial result."""
import numpy as np

from meshcheck import pipeline
from meshcheck.pipeline import AuditSettings, audit
from meshes import tet_box


def test_cell_checks_beside_the_topology_equal_the_serial_audit(monkeypatch):
    mesh = tet_box((26, 26, 26), size=(2.0, 1.5, 1.0))
    assert mesh.n_cells > pipeline.OVERLAP_CELLS
    settings = AuditSettings((200.0, 400.0))
    par = audit(mesh, settings)
    monkeypatch.setattr(pipeline, "OVERLAP_CELLS", 10 ** 12)
    ser = audit(mesh, settings)
    assert np.array_equal(par.min_scaled_jacobian, ser.min_scaled_jacobian)
    assert par.quality.names == ser.quality.names
    for name in par.quality.names:
        assert np.array_equal(par.quality[name], ser.quality[name], equal_nan=True), name
    assert [f.code for f in par.findings] == [f.code for f in ser.findings]
    assert np.array_equal(par.advice.cell_limit, ser.advice.cell_limit)
    # the curvature check (beside the size jumps) and the size jumps themselves
    for field in ("face_ids", "kappa", "rho", "chord_height", "misfit", "listed_cells"):
        assert np.array_equal(getattr(par.curvature, field), getattr(ser.curvature, field),
                              equal_nan=True), field
    assert np.array_equal(par.gradation.pairs, ser.gradation.pairs)
    # the sweep and the cluster searches (run side by side on large meshes)
    assert np.array_equal(par.sweep.dofs, ser.sweep.dofs)
    assert np.array_equal(par.sweep.order_counts, ser.sweep.order_counts)
    for a, b in ((par.refine_clusters, ser.refine_clusters),
                 (par.coarsen_clusters, ser.coarsen_clusters)):
        assert [(c.cells, c.volume) for c in a] == [(c.cells, c.volume) for c in b]
    assert par.timings["analysis"] > 0
