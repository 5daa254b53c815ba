"""The audit pipeline: overlapping stages give the serial result."""
import numpy as np
import pytest

from meshcheck import pipeline
from meshcheck.pipeline import AuditSettings, audit
from meshes import hex_box, tet10_box, tet_box


@pytest.mark.parametrize("early", [False, True], ids=["geometry beside the sweep",
                                                      "geometry once the faces exist"])
def test_cell_checks_beside_the_topology_equal_the_serial_audit(monkeypatch, kernel_mode,
                                                                early):
    # large meshes: the cell checks beside the topology; the size jumps and the curvature
    # check beside the sweep, or (from EARLY_GEOMETRY_CELLS) started as soon as the
    # topology's faces exist, reading only its edges and faces
    monkeypatch.setattr(pipeline, "EARLY_GEOMETRY_CELLS", 0 if early else 10 ** 12)
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
    # the curvature check and the size jumps (beside the sweep and the cluster searches)
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


def _spread(mesh, stride):
    """The mesh with node i renumbered i * stride (order kept); the unused nodes between
    sit on node 0, so the bounding box is unchanged."""
    from meshcheck.mesh import CellBlock, Mesh

    pts = np.repeat(mesh.points[:1], mesh.n_points * stride, axis=0)
    pts[::stride] = mesh.points
    blocks = tuple(CellBlock(b.type, b.cells * stride, b.region) for b in mesh.blocks)
    return Mesh(pts, blocks, mesh.region_names, mesh.dim, mesh.source, mesh.unit)


@pytest.mark.parametrize("path", ["numpy", "numba"])
@pytest.mark.parametrize("kind", ["tetra", "tetra10", "hexahedron"])
def test_node_numbers_past_the_int32_key_range_give_the_same_audit(kind, path, monkeypatch):
    # the topology's index arrays are int32: keys such as a * (n + 1) + b built from them
    # overflow int32 once n > 46,340; spreading the node numbers over 0..~10**5 makes such
    # keys wrap many times (and lose their order), and the audit and the cost quote must
    # not change
    from meshcheck.cost import job_cost, job_cost_dict

    monkeypatch.setenv("MESHCHECK_KERNELS", path)
    mesh = {"tetra": lambda: tet_box((4, 3, 3)), "tetra10": lambda: tet10_box((3, 2, 2)),
            "hexahedron": lambda: hex_box((4, 3, 3))}[kind]()
    stride = 100_000 // mesh.n_points
    far = _spread(mesh, stride)
    assert far.n_points ** 2 > 2**33
    settings = AuditSettings((300.0, 600.0, 900.0))
    a, b = audit(mesh, settings), audit(far, settings)
    assert b.topology.edges.nodes.dtype == np.int32 and far.blocks[0].cells.dtype == np.int32
    assert np.array_equal(a.topology.edges.nodes * stride, b.topology.edges.nodes)
    assert np.array_equal(a.topology.faces.cells, b.topology.faces.cells)
    assert np.array_equal(a.topology.edges.length, b.topology.edges.length)
    assert [f.code for f in a.findings] == [f.code for f in b.findings
                                            if f.code != "unused_nodes"]
    assert np.array_equal(a.advice.cell_limit, b.advice.cell_limit)
    assert np.array_equal(a.sweep.dofs, b.sweep.dofs)
    assert np.array_equal(a.sweep.order_counts, b.sweep.order_counts)
    assert [c.cells for c in a.coarsen_clusters] == [c.cells for c in b.coarsen_clusters]
    if kind == "tetra10":
        assert np.array_equal(a.curvature.kappa, b.curvature.kappa, equal_nan=True)
        assert a.quadratic.low == b.quadratic.low
    elif kind == "tetra":
        assert np.array_equal(a.curvature.kappa, b.curvature.kappa, equal_nan=True)
        assert np.array_equal(a.topology.duplicate_cells, b.topology.duplicate_cells)
    else:
        assert np.array_equal(a.directional.orders, b.directional.orders)
    freqs = settings.frequencies
    ca = job_cost_dict(job_cost(mesh, a.topology, a.advice, freqs))
    cb = job_cost_dict(job_cost(far, b.topology, b.advice, freqs))
    assert ca == cb


@pytest.mark.parametrize("early", [False, True], ids=["beside the sweep", "beside the advice"])
def test_hexahedra_geometry_checks_beside_the_advice_equal_the_serial_audit(monkeypatch,
                                                                            early):
    # hexahedra: the curvature check and the size jumps run beside the sweep and the
    # cluster searches, or (the largest meshes) beside the validity and advice stages,
    # the directional orders after them; the same results as one after the other
    from dataclasses import replace

    mesh = hex_box((8, 6, 5), size=(2.0, 1.5, 1.0))
    top = mesh.points.max(axis=0)
    mesh = replace(mesh, points=top * (mesh.points / top) ** 3)  # size jumps near 0
    settings = AuditSettings((300.0, 900.0))
    monkeypatch.setattr(pipeline, "OVERLAP_CELLS", 0)
    monkeypatch.setattr(pipeline, "EARLY_GEOMETRY_CELLS", 0 if early else 10 ** 12)
    par = audit(mesh, settings)
    monkeypatch.setattr(pipeline, "OVERLAP_CELLS", 10 ** 12)
    ser = audit(mesh, settings)
    assert par.directional is not None
    for field in ("orders", "isotropic", "anisotropic_cells", "dofs_isotropic",
                  "dofs_directional"):
        assert np.array_equal(getattr(par.directional, field),
                              getattr(ser.directional, field)), field
    assert [f.code for f in par.findings] == [f.code for f in ser.findings]
    assert np.array_equal(par.curvature.kappa, ser.curvature.kappa, equal_nan=True)
    assert par.gradation.count == ser.gradation.count > 0
    assert np.array_equal(par.gradation.pairs, ser.gradation.pairs)
    assert par.sweep.dofs.tolist() == ser.sweep.dofs.tolist()


def test_cell_speeds_and_their_comparison_without_a_pass():
    # one speed: a read-only broadcast equal to the full array; region speeds: a full
    # array; _same_values equals np.array_equal on broadcasts and arrays alike
    mesh = tet_box((3, 3, 3))
    s = AuditSettings(frequencies=(100.0,))
    c = pipeline.cell_speeds(mesh, s)
    assert c.strides == (0,) and not c.flags.writeable
    assert np.array_equal(c, np.full(mesh.n_cells, s.default_speed))
    tag = int(mesh.region_tags[0])
    full = pipeline.cell_speeds(mesh, AuditSettings(frequencies=(100.0,),
                                                    region_speeds={tag: 500.0}))
    assert full.strides != (0,) and np.all(full[mesh.region == tag] == 500.0)
    n = mesh.n_cells
    one, other = (np.broadcast_to(np.float64(v), (n,)) for v in (343.0, 340.0))
    nan = np.broadcast_to(np.float64(np.nan), (n,))
    for a, b in [(c, c), (one, one.copy()), (one, other), (one, nan), (nan, nan), (c, full),
                 (one[:0], other[:0]), (one, one[:-1])]:
        assert pipeline._same_values(a, b) == np.array_equal(a, b)


def test_uniform_equals_the_comparison_with_the_first_value():
    from meshcheck.advice import _uniform

    for x in [np.full(5, 2.0), np.broadcast_to(np.float64(2.0), (5,)), np.r_[2.0, 2.0, 3.0],
              np.broadcast_to(np.float64(np.nan), (4,)), np.r_[np.nan, np.nan], np.r_[7.0]]:
        assert _uniform(x) == bool(np.all(x == x[0])), x


@pytest.mark.parametrize("given", [(500.0, 100.0, 100.0, 250.0), (80.0,), [[40.0, 40.0], [20.0, 1e4]],
                                   tuple(np.random.default_rng(3).integers(1, 9, 50) * 12.5)])
def test_settings_keep_the_distinct_frequencies_sorted(given):
    # the sweep's frequencies as np.unique gives them (sorted, repeats dropped), floats
    got = AuditSettings(frequencies=given).frequencies
    assert got == tuple(np.unique(np.asarray(given, float)).tolist())
    assert all(type(f) is float for f in got)
