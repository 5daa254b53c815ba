"""Mean flow: the projection factor against its closed form, a brute-force maximisation
over wave directions from the convected dispersion relation, and its effect on the advice.

Convected wave equation (Rienstra & Hirschberg, "An Introduction to Acoustics"; Pierce,
"Acoustics"): plane waves exp(i(omega t - kappa d.x)) obey (omega - U.kappa d)^2 = c^2 kappa^2.
"""
import numpy as np
import pytest
from scipy.optimize import minimize

from meshcheck.advice import AdviceSettings, advise
from meshcheck.errors import SettingsError
from meshcheck.flow import edge_flow_factor, projection_factor, worst_direction
from meshcheck.job import Job, RegionSpec, resolve_media
from meshcheck.mesh import CellBlock, Mesh
from meshcheck.pipeline import AuditSettings, audit
from meshcheck.topology import build_topology
from meshes import LIMIT_RTOL, grid_hexes, grid_points, hex_box

C = 343.0


def _kappa_from_dispersion(d, m, k=1.0):
    """|kappa| of the wave with normal d: the positive root of the quadratic
    (m.d^2 - 1) kappa^2 - 2 k (m.d) kappa + k^2 = 0, i.e. (k - kappa m.d)^2 = kappa^2
    (omega/c = k), with omega - U.kappa > 0; generic quadratic formula, both roots."""
    a = d @ m
    A, B = a * a - 1.0, -2.0 * k * a
    disc = np.sqrt(B * B - 4.0 * A * k * k)
    roots = np.stack([(-B + disc) / (2 * A), (-B - disc) / (2 * A)])
    ok = (roots > 0) & (k - roots * a > 0)
    return np.where(ok, roots, np.inf).min(axis=0)


def _fibonacci_sphere(n):
    i = np.arange(n) + 0.5
    z = 1 - 2 * i / n
    phi = np.pi * (1 + 5 ** 0.5) * i
    r = np.sqrt(1 - z * z)
    return np.column_stack([r * np.cos(phi), r * np.sin(phi), z])


def _brute_force(m, e, n=4000):
    """max over unit d of kappa(d) |d.e|: dense directions, then a local optimiser."""
    d = _fibonacci_sphere(n)
    vals = _kappa_from_dispersion(d, m) * np.abs(d @ e)
    best = d[np.argmax(vals)]

    def neg(x):
        u = np.array([np.sin(x[0]) * np.cos(x[1]), np.sin(x[0]) * np.sin(x[1]), np.cos(x[0])])
        return -float(_kappa_from_dispersion(u[None], m)[0] * abs(u @ e))

    x0 = [np.arccos(np.clip(best[2], -1, 1)), np.arctan2(best[1], best[0])]
    res = minimize(neg, x0, method="Nelder-Mead", options={"xatol": 1e-10, "fatol": 1e-13})
    return max(-res.fun, vals.max())


CASES = [(0.0, 0.0), (0.3, 0.0), (0.3, 30.0), (0.3, 90.0), (0.5, 45.0), (0.8, 10.0),
         (0.8, 120.0), (0.95, 60.0)]


@pytest.mark.parametrize("M,angle", CASES, ids=[f"M{m}-{a}deg" for m, a in CASES])
def test_projection_matches_brute_force_over_directions(M, angle):
    rng = np.random.default_rng(int(M * 100 + angle))
    m_dir = rng.normal(size=3)
    m_dir /= np.linalg.norm(m_dir)
    # an edge at the given angle to the flow, in a random plane
    q = rng.normal(size=3)
    q -= (q @ m_dir) * m_dir
    q /= np.linalg.norm(q)
    a = np.radians(angle)
    e = np.cos(a) * m_dir + np.sin(a) * q
    m = M * m_dir
    assert projection_factor(m, e) == pytest.approx(_brute_force(m, e), rel=1e-7)


@pytest.mark.parametrize("M", [0.1, 0.3, 0.6, 0.9])
def test_closed_form_along_and_across_the_flow(M):
    m = np.array([M, 0.0, 0.0])
    # along the flow: the upstream wave, k / (1 - M) (REFERENCES: k / (1 + M cos phi), phi = pi)
    assert projection_factor(m, [1.0, 0, 0]) == pytest.approx(1.0 / (1.0 - M), rel=1e-14)
    assert projection_factor(m, [-2.0, 0, 0]) == pytest.approx(1.0 / (1.0 - M), rel=1e-14)
    # across: max over phi of |sin phi| / (1 + M cos phi) = 1 / sqrt(1 - M^2)
    assert projection_factor(m, [0, 0, 3.0]) == pytest.approx(1.0 / np.sqrt(1 - M * M), rel=1e-14)


@pytest.mark.parametrize("M,angle", CASES[1:], ids=[f"M{m}-{a}deg" for m, a in CASES[1:]])
def test_worst_direction_attains_the_factor(M, angle):
    a = np.radians(angle)
    m = np.array([M, 0.0, 0.0])
    e = np.array([np.cos(a), np.sin(a), 0.0])
    d = worst_direction(m, e)
    assert np.linalg.norm(d) == pytest.approx(1.0, abs=1e-12)
    got = _kappa_from_dispersion(d[None], m)[0] * abs(d @ e)
    assert got == pytest.approx(projection_factor(m, e), rel=1e-10)


def test_supersonic_flow_refused():
    with pytest.raises(SettingsError, match="Mach"):
        projection_factor([1.0, 0, 0], [1.0, 0, 0])


def test_edge_factor_per_direction_and_max_over_regions():
    # flow along x in region 1 only; edges along x, y, z; interface edges take the max
    mesh = hex_box((2, 1, 1), size=(2.0, 1.0, 1.0))
    region = np.where(mesh.centroids[:, 0] < 1.0, 1, 2)
    mesh = Mesh(mesh.points, (CellBlock("hexahedron", mesh.blocks[0].cells, region),))
    topo = build_topology(mesh)
    M = 0.4
    mach = np.zeros((mesh.n_cells, 3))
    mach[region == 1] = [M, 0, 0]
    phi = edge_flow_factor(mesh.points, topo.edges, mach)
    d = mesh.points[topo.edges.nodes[:, 1]] - mesh.points[topo.edges.nodes[:, 0]]
    x_mid = 0.5 * (mesh.points[topo.edges.nodes[:, 0], 0] + mesh.points[topo.edges.nodes[:, 1], 0])
    along = np.abs(d[:, 0]) > 0
    in_flow = x_mid <= 1.0 + 1e-12   # edges of region-1 cells (x <= 1)
    assert np.allclose(phi[along & in_flow], 1 / (1 - M))
    assert np.allclose(phi[~along & in_flow], 1 / np.sqrt(1 - M * M))
    assert np.allclose(phi[~in_flow], 1.0)


@pytest.mark.parametrize("M", [0.2, 0.5])
def test_usable_frequency_falls_by_one_minus_mach_along_the_flow(M):
    # cubic cells: every edge has the same h and L/h, so the limit is set by the edges along
    # the flow and scales by exactly (1 - M)
    mesh = hex_box((4, 4, 4))
    topo = build_topology(mesh)
    c = np.full(mesh.n_cells, C)
    s = AdviceSettings(max_order=6)
    still = advise(mesh, topo, c, 500.0, s)
    mach = np.tile([M, 0.0, 0.0], (mesh.n_cells, 1))
    moving = advise(mesh, topo, c, 500.0, s, cell_mach=mach)
    assert np.allclose(moving.cell_limit / still.cell_limit, 1 - M, rtol=LIMIT_RTOL)


@pytest.mark.parametrize("M", [0.2, 0.5])
def test_edges_across_the_flow_lose_only_sqrt_one_minus_mach_squared(M):
    # cells 10x thinner along the flow: the x-edges are short and never govern; the y and z
    # edges (across the flow) set the limit, reduced by sqrt(1 - M^2)
    n = (20, 2, 2)
    pts = grid_points(n, size=(0.2, 1.0, 1.0))
    hexes = grid_hexes(n)
    mesh = Mesh(pts, (CellBlock("hexahedron", hexes, np.ones(len(hexes))),))
    topo = build_topology(mesh)
    c = np.full(mesh.n_cells, C)
    s = AdviceSettings(max_order=4)
    still = advise(mesh, topo, c, 500.0, s)
    moving = advise(mesh, topo, c, 500.0, s, cell_mach=np.tile([M, 0, 0], (mesh.n_cells, 1)))
    assert np.allclose(moving.cell_limit / still.cell_limit, np.sqrt(1 - M * M), rtol=LIMIT_RTOL)


def test_job_flow_reaches_the_audit_and_mach_one_is_refused():
    mesh = hex_box((3, 3, 3))
    job = Job(regions=(RegionSpec("air", flow=(0.3 * 343.0, 0.0, 0.0), speed=343.0 + 0j),))
    res = audit(mesh, AuditSettings((200.0,), AdviceSettings(max_order=4), job=job))
    ref = audit(mesh, AuditSettings((200.0,), AdviceSettings(max_order=4), speed=343.0))
    assert res.advice.mesh_limit == pytest.approx(0.7 * ref.advice.mesh_limit, rel=LIMIT_RTOL)
    assert res.media.regions[1].mach_number == pytest.approx(0.3)
    fast = Job(regions=(RegionSpec("air", flow=(0.0, 350.0, 0.0), speed=343.0 + 0j),))
    with pytest.raises(SettingsError, match=r"Mach 1\.02 >= 1"):
        resolve_media(mesh, fast)


def test_target_size_uses_the_worst_edge_factor_of_the_cell():
    from meshcheck.dispersion import usable_kh
    mesh = hex_box((3, 3, 3))
    topo = build_topology(mesh)
    M, f = 0.4, 800.0
    # correction_3d=False: `expected` is the plain 1D model's size (the flow factor is checked)
    s = AdviceSettings(order=2, max_order=4, correction_3d=False)
    adv = advise(mesh, topo, np.full(mesh.n_cells, C), f, s,
                 cell_mach=np.tile([0.0, M, 0.0], (mesh.n_cells, 1)))
    k = 2 * np.pi * f / C / (1 - M)          # every cell has an edge along the flow
    expected = usable_kh(s.target, 12).max_size(2, k, adv.cell_distance)
    assert np.allclose(adv.target_size, expected, rtol=2**-22, atol=0)  # kept in float32
