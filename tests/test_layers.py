"""Absorbing layers: thickness and cells across on structured layers of known size,
conformity, the usual-range messages, and the point-to-triangle distance against trimesh."""
import numpy as np
import pytest
import trimesh

from meshcheck.advice import AdviceSettings
from meshcheck.job import parse_job
from meshcheck.layers import check_layer, closest_point_on_triangles, nearest_on_surface
from meshcheck.mesh import CellBlock, Mesh
from meshcheck.pipeline import AuditSettings, audit
from meshcheck.topology import build_topology
from meshes import KUHN, grid_hexes


def _layered(n=4, m=3, t=0.3, tets=False, one_sided=False):
    """Unit-cube fluid (region 1, n cells a side) with a layer (region 2) of thickness t and
    m cells across: on all six sides, or only beyond x = 1."""
    inner = np.linspace(0, 1, n + 1)
    lo, hi = np.linspace(-t, 0, m + 1)[:-1], np.linspace(1, 1 + t, m + 1)[1:]
    xs = np.concatenate([inner, hi]) if one_sided else np.concatenate([lo, inner, hi])
    ys = inner if one_sided else xs
    X, Y, Z = np.meshgrid(xs, ys, ys, indexing="ij")
    pts = np.column_stack([X.ravel(), Y.ravel(), Z.ravel()])
    h = grid_hexes((len(xs) - 1, len(ys) - 1, len(ys) - 1))
    if tets:
        h = h[:, KUHN].reshape(-1, 4)
    c = pts[h].mean(axis=1)
    region = np.where(np.all((c > 0) & (c < 1), axis=1), 1, 2)
    return Mesh(pts, (CellBlock("tetra" if tets else "hexahedron", h, region),),
                {1: "air", 2: "pml"})


CASES = [(dict(), 6 * 16), (dict(tets=True), 6 * 32), (dict(one_sided=True), 16),
         (dict(one_sided=True, tets=True), 32), (dict(m=5, t=0.5), 6 * 16)]


@pytest.mark.parametrize("kw,n_interface", CASES,
                         ids=["shell-hex", "shell-tet", "slab-hex", "slab-tet", "thick-hex"])
def test_structured_layer_thickness_and_cells_across(kw, n_interface):
    mesh = _layered(**kw)
    t, m = kw.get("t", 0.3), kw.get("m", 3)
    c, fmin = 343.0, 100.0
    res = check_layer(mesh, build_topology(mesh), 2, c, fmin)
    assert res.thickness == pytest.approx((t, t, t), rel=1e-12)
    assert res.cells_across == (m, m)
    assert res.interface_faces == n_interface and res.conforming
    assert res.nonconforming_faces == 0
    assert res.thickness_wavelengths[0] == pytest.approx(t * fmin / c, rel=1e-12)
    if kw.get("one_sided"):
        assert res.lateral_faces > 0   # the side walls running through the slab
    else:
        assert res.lateral_faces == 0


@pytest.mark.parametrize("fmin,m,codes", [
    (100.0, 3, {"layer_thin", "layer_few_cells"}),     # 0.09 wavelengths, 3 cells
    (400.0, 4, set()),                                  # 0.35 wavelengths, 4 cells
    (3000.0, 6, {"layer_thick"}),                       # 2.6 wavelengths
], ids=["thin", "usual", "thick"])
def test_usual_range_messages(fmin, m, codes):
    mesh = _layered(m=m, t=0.3)
    res = check_layer(mesh, build_topology(mesh), 2, 343.0, fmin)
    assert {code for _, code, _ in res.messages} == codes


def test_nonconforming_interface_is_found():
    # the layer slab has its own nodes (not merged) and a finer grid on the shared plane x = 1
    xs = np.linspace(0, 1, 3)
    X, Y, Z = np.meshgrid(xs, xs, xs, indexing="ij")
    p1 = np.column_stack([X.ravel(), Y.ravel(), Z.ravel()])
    h1 = grid_hexes((2, 2, 2))
    ls, ys = np.linspace(1, 1.4, 5), np.linspace(0, 1, 4)
    X, Y, Z = np.meshgrid(ls, ys, ys, indexing="ij")
    p2 = np.column_stack([X.ravel(), Y.ravel(), Z.ravel()])
    h2 = grid_hexes((4, 3, 3)) + len(p1)
    mesh = Mesh(np.vstack([p1, p2]), (CellBlock("hexahedron", np.vstack([h1, h2]),
                                                np.r_[np.ones(len(h1)), np.full(len(h2), 2)]),),
                {1: "air", 2: "pml"})
    res = check_layer(mesh, build_topology(mesh), 2, 343.0, 100.0, surrounds=1)
    assert res.interface_faces == 0 and not res.conforming
    assert res.nonconforming_faces == 9
    assert {code for _, code, _ in res.messages} >= {"layer_no_interface", "layer_nonconforming"}


def test_closest_point_matches_trimesh():
    rng = np.random.default_rng(3)
    tri = rng.normal(size=(500, 3, 3))
    tri[:10, 2] = tri[:10, 1]                     # a few degenerate (segment) triangles
    p = rng.normal(size=(500, 3)) * 2
    ours = closest_point_on_triangles(p, tri[:, 0], tri[:, 1], tri[:, 2])
    ref = trimesh.triangles.closest_point(tri, p)
    assert np.allclose(np.linalg.norm(ours - p, axis=1), np.linalg.norm(ref - p, axis=1),
                       atol=1e-12)


def test_nearest_on_surface_is_the_minimum_over_all_triangles():
    rng = np.random.default_rng(4)
    tri = rng.uniform(0, 1, size=(300, 3, 3)) * [1, 1, 0.05]
    q = rng.uniform(-0.5, 1.5, size=(200, 3))
    d, pt = nearest_on_surface(q, tri)
    all_pts = closest_point_on_triangles(np.repeat(q, len(tri), axis=0), *[np.tile(tri[:, i],
                                         (len(q), 1)) for i in range(3)])
    brute = np.linalg.norm(all_pts - np.repeat(q, len(tri), axis=0), axis=1).reshape(len(q), -1)
    assert np.allclose(d, brute.min(axis=1), atol=1e-14)
    assert np.allclose(np.linalg.norm(pt - q, axis=1), d)


def test_layer_role_from_the_job_reaches_the_audit():
    mesh = _layered(m=3, t=0.3)
    job = parse_job({"region": {"pml": {"role": "pml", "surrounds": "air"}}})
    res = audit(mesh, AuditSettings((100.0, 500.0), AdviceSettings(max_order=4), job=job))
    assert len(res.layers) == 1 and res.layers[0].surrounds == (1,)
    assert res.layers[0].thickness[0] == pytest.approx(0.3)
    codes = {f.code for f in res.findings}
    assert {"layer_thin", "layer_few_cells"} <= codes
