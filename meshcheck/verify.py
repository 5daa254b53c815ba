"""Check the advice with real 3D Helmholtz solves (NGSolve, optional extra ``[verify]``).

The mesh meshcheck holds is handed to NGSolve as arrays (no file): the
volume cells with their corner nodes and every boundary face (a face of
one cell only, :attr:`meshcheck.topology.Faces.count` == 1) as a surface
element.  On this mesh

    -lap u - k^2 u = 0  in the fluid,
    du/dn - i k u = g   on the whole boundary (Robin / impedance),

is solved with hierarchical H1 elements (NGSolve's ``H1``, integrated
Legendre / Jacobi basis; one sparse direct factorisation, cell interiors
included, which measured no slower than NGSolve's complex static
condensation and much faster for hexahedra) at exactly the orders
the advice gives: cell c gets order p_c = ``advice.cell_order`` (capped at
the allowed order), every edge and face the highest order of the cells
sharing it (maximum rule), as :func:`meshcheck.cost.variable_order_dofs`
counts them.  The data g is taken from a known exact solution, so any
mesh shape works:

* plane waves u = exp(i k d.x) for the 26 directions d of a cube's face
  centres, edge midpoints and corners (default), g = i k (d.n - 1) u;
* a point source, the free-field Green's function
  G = exp(i k r) / (4 pi r), r = |x - x0|, with x0 outside the bounding
  box, g = (i k - 1/r) G (x - x0).n / r - i k G.

The measured error of each solve is the relative L2 error over the domain,
``||u_h - u|| / ||u||``, integrated with Gauss rules of order 2 p_max + 4
(exact for the squared polynomial part, and converged for the smooth
exact solution).  Weak form (e.g. Ihlenburg, "Finite Element Analysis of
Acoustic Scattering", Springer 1998, ch. 2):
``int grad u . grad v - k^2 u v dx - i k int u v ds = int g v ds``
(complex symmetric, no conjugation).

Geometry: quadratic cells are given to the solver by their corners
(straight-sided); the exact-solution data keeps the test exact on that
domain.  The sound speed must be the same in every cell (one k).

The prediction each solve is compared with is the advisor's own: the 1D
model of :mod:`meshcheck.dispersion` per cell at its order, with the 3D
correction of :func:`meshcheck.advice.size_correction` (derived from solves
like these; docs/validation.md).

The library never prints: NGSolve's messages are switched off while it runs.
"""
from __future__ import annotations

import importlib
import importlib.util
import time
from dataclasses import dataclass, field

import numpy as np

from .advice import Advice, size_correction
from .cost import entity_orders
from .dispersion import predicted_error
from .errors import MeshcheckError, SettingsError
from .mesh import Mesh
from .topology import Topology

__all__ = ["SolverUnavailable", "INSTALL_HINT", "CUBE_DIRECTIONS", "VerifySettings", "SolverMesh",
           "Solve", "Verification", "ngsolve_available", "require_ngsolve", "solver_mesh",
           "order_space", "space_orders", "advised_orders",
           "predicted_errors", "solve_orders", "verify", "point_source_position",
           "verification_dict"]

INSTALL_HINT = 'pip install "meshcheck[verify]"'


class SolverUnavailable(MeshcheckError):
    """The optional reference solver (NGSolve) is not installed."""


def _cube_directions() -> np.ndarray:
    d = np.array([(i, j, k) for i in (-1, 0, 1) for j in (-1, 0, 1) for k in (-1, 0, 1)
                  if (i, j, k) != (0, 0, 0)], dtype=float)
    d /= np.linalg.norm(d, axis=1)[:, None]
    d.setflags(write=False)
    return d


CUBE_DIRECTIONS = _cube_directions()
"""(26, 3) float64 unit vectors towards the face centres, edge midpoints and
corners of a cube: 6 axis, 12 face-diagonal and 8 space-diagonal directions."""

# Corner order of NGSolve's reference cells from meshio/VTK's (meshcheck.cells):
# NGSolve's tet is (1,0,0) (0,1,0) (0,0,1) (0,0,0), its prism (1,0,0) (0,1,0) (0,0,0)
# over z = 0 then z = 1; hex and pyramid have VTK's vertex order.  With these maps the
# Jacobian in NGSolve is positive for cells meshcheck finds positive (tested).
_NG_CORNERS = {"tetra": [1, 2, 3, 0], "hexahedron": [0, 1, 2, 3, 4, 5, 6, 7],
               "wedge": [1, 2, 0, 4, 5, 3], "pyramid": [0, 1, 2, 3, 4]}


def ngsolve_available() -> bool:
    """True when the ``ngsolve`` package can be imported (not imported here)."""
    return importlib.util.find_spec("ngsolve") is not None


def require_ngsolve():
    """Import and return the ``ngsolve`` module; SolverUnavailable with the install hint."""
    try:
        return importlib.import_module("ngsolve")
    except ImportError as exc:
        raise SolverUnavailable(f"verification needs NGSolve, which is not installed: "
                                f"{INSTALL_HINT}") from exc


@dataclass(frozen=True)
class VerifySettings:
    """How the advice is checked.

    directions : (n, 3) plane-wave directions (normalised here); None = the 26
        :data:`CUBE_DIRECTIONS`.
    point_source : also solve the point-source problem.
    source_distance : distance of the source from the bounding box's maximum
        corner along the box diagonal, as a fraction of the diagonal (> 0, so
        the source lies outside the domain).
    compare : also solve at uniform orders p and p - 1 (p = highest advised order).
    error_order : quadrature order of the error integral; None = 2 p_max + 4.
    data_bonus : extra quadrature order for the boundary data g.
    solver : NGSolve sparse direct solver ("sparsecholesky" or "umfpack").
    """

    directions: np.ndarray | None = None
    point_source: bool = True
    source_distance: float = 0.5
    compare: bool = True
    error_order: int | None = None
    data_bonus: int = 4
    solver: str = "sparsecholesky"

    def __post_init__(self):
        d = CUBE_DIRECTIONS if self.directions is None else np.array(self.directions, float)
        if d.ndim != 2 or d.shape[1] != 3 or not len(d):
            raise SettingsError("plane-wave directions must have shape (n, 3)")
        norm = np.linalg.norm(d, axis=1)
        if not np.all(np.isfinite(norm) & (norm > 0)):
            raise SettingsError("plane-wave directions must be finite and non-zero")
        d = d / norm[:, None]
        d.setflags(write=False)
        object.__setattr__(self, "directions", d)
        if not self.source_distance > 0:
            raise SettingsError("the point source must lie outside the domain "
                                "(source_distance > 0)")
        if self.error_order is not None and not 1 <= self.error_order <= 60:
            raise SettingsError("error quadrature order must be between 1 and 60")
        if self.solver not in ("sparsecholesky", "umfpack"):
            raise SettingsError(f"unknown solver {self.solver!r} (sparsecholesky or umfpack)")


@dataclass(frozen=True)
class SolverMesh:
    """An NGSolve mesh built from a meshcheck Mesh, with the entity maps.

    mesh, topo : the meshcheck mesh and its topology.
    ngmesh : ``ngsolve.Mesh``; volume element i is meshcheck cell i.
    vertex_of_node : (n_points,) int64 solver vertex of each meshcheck node (-1 unused).
    edge_ids : (n_e,) int64 solver edge number of each meshcheck edge.
    face_ids : (n_f,) int64 solver face number of each meshcheck face.
    n_boundary : number of boundary faces given as surface elements.
    """

    mesh: Mesh
    topo: Topology
    ngmesh: object
    vertex_of_node: np.ndarray
    edge_ids: np.ndarray
    face_ids: np.ndarray
    n_boundary: int


def _keys(rows: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Order-free int64 keys (k_lo, k_hi) of rows of 2..4 vertex numbers (-1 pad)."""
    s = np.sort(rows, axis=1)
    if s.shape[1] == 2:
        return s[:, 0], s[:, 1]
    s = np.column_stack([np.full((len(s), 4 - s.shape[1]), -1, np.int64), s]) \
        if s.shape[1] < 4 else s
    nn = np.int64(n + 1)
    return (s[:, 0] + 1) * nn + s[:, 3], s[:, 1] * nn + s[:, 2]


def _match(ours: tuple, theirs: tuple, what: str) -> np.ndarray:
    """Index into ``theirs`` of every row of ``ours`` (both (k_lo, k_hi) keys)."""
    if len(ours[0]) != len(theirs[0]):
        raise MeshcheckError(f"internal: the solver found {len(theirs[0])} {what}, "
                             f"meshcheck {len(ours[0])}")
    order = np.lexsort(theirs[::-1])  # primary k_lo
    a = np.lexsort(ours[::-1])
    if not (np.array_equal(ours[0][a], theirs[0][order])
            and np.array_equal(ours[1][a], theirs[1][order])):
        raise MeshcheckError(f"internal: the solver's {what} differ from meshcheck's")
    out = np.empty(len(a), np.int64)
    out[a] = order
    return out


def solver_mesh(mesh: Mesh, topo: Topology) -> SolverMesh:
    """Build the NGSolve mesh of a 3D meshcheck Mesh (corners only) with its boundary.

    Every cell becomes a volume element of material "fluid" in global cell
    order; every boundary face (``topo.faces.count == 1``) a surface element of
    boundary "boundary", oriented outwards.  The solver's edges and faces are
    matched to meshcheck's by sorted vertex keys (read once, one Python call per
    entity: NGSolve exposes no array of them); a mismatch raises MeshcheckError.
    Raises SettingsError for 2D models, SolverUnavailable without NGSolve.
    """
    ng = require_ngsolve()
    from netgen import meshing as nm

    if mesh.dim != 3:
        raise SettingsError(f"{mesh.source or 'mesh'}: verification supports volume (3D) "
                            "meshes only")
    used = np.zeros(mesh.n_points, bool)
    for b in mesh.blocks:
        used[b.cells[:, :b.info.n_corners]] = True
    vertex = np.full(mesh.n_points, -1, np.int64)
    vertex[used] = np.arange(int(used.sum()))
    m = nm.Mesh(dim=3)
    m.AddPoints(np.ascontiguousarray(mesh.points[used]))
    m.Add(nm.FaceDescriptor(bc=1, domin=1, domout=0, surfnr=1))
    m.SetBCName(0, "boundary")
    m.SetMaterial(1, "fluid")
    for b in mesh.blocks:
        corners = vertex[b.cells[:, _NG_CORNERS[b.info.linear]]]
        m.AddElements(dim=3, index=1, data=np.ascontiguousarray(corners, np.int32), base=0)
    faces = topo.faces
    bnd = faces.nodes_of(faces.count == 1)
    tri = bnd[:, 3] < 0
    for rows in (bnd[tri, :3], bnd[~tri]):
        if len(rows):
            m.AddElements(dim=2, index=1, data=np.ascontiguousarray(vertex[rows], np.int32),
                          base=0)
    ngm = ng.Mesh(m)
    nv = int(used.sum())
    ng_edges = np.array([[v.nr for v in e.vertices] for e in ngm.edges], np.int64).reshape(-1, 2)
    ng_faces = np.full((ngm.nface, 4), -1, np.int64)
    for i, f in enumerate(ngm.faces):
        vs = [v.nr for v in f.vertices]
        ng_faces[i, :len(vs)] = vs
    edge_ids = _match(_keys(vertex[topo.edges.nodes], nv), _keys(ng_edges, nv), "edges")
    fn = faces.nodes  # made once (not kept by the faces)
    our_f = np.where(fn >= 0, vertex[np.maximum(fn, 0)], -1)
    face_ids = _match(_keys(our_f, nv), _keys(ng_faces, nv), "faces")
    return SolverMesh(mesh, topo, ngm, vertex, edge_ids, face_ids, int(len(bnd)))


def order_space(sm: SolverMesh, cell_order: np.ndarray):
    """Complex NGSolve H1 space with order ``cell_order[c]`` in cell c (maximum rule).

    The space starts at the lowest order and every cell, edge and face with a
    higher order is raised one by one (NGSolve's ``SetOrder`` takes one node
    at a time; cost ~1 us per entity, small beside the solve).
    """
    ng = require_ngsolve()
    p = np.asarray(cell_order, np.int64)
    if p.shape != (sm.ngmesh.ne,) or p.min() < 1:
        raise SettingsError("cell orders must be >= 1, one per cell")
    edge, face = entity_orders(sm.mesh, sm.topo, p)
    base = int(p.min())
    fes = ng.H1(sm.ngmesh, order=base, complex=True)
    if np.any(p > base):
        for kind, ids, orders in ((ng.CELL, np.arange(len(p)), p), (ng.EDGE, sm.edge_ids, edge),
                                  (ng.FACE, sm.face_ids, face)):
            up = np.flatnonzero(orders > base)
            for i, q in zip(ids[up].tolist(), orders[up].tolist()):
                fes.SetOrder(ng.NodeId(kind, i), q)
        fes.UpdateDofTables()
    return fes


def space_orders(fes, sm: SolverMesh) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Orders the solver holds, read back: cells (n_cells,), edges (n_e,), faces (n_f,)
    in meshcheck's numbering (int64)."""
    ng = require_ngsolve()
    cell = np.array([fes.GetOrder(ng.NodeId(ng.CELL, i)) for i in range(sm.ngmesh.ne)], np.int64)
    edge = np.array([fes.GetOrder(ng.NodeId(ng.EDGE, int(i))) for i in sm.edge_ids], np.int64)
    face = np.array([fes.GetOrder(ng.NodeId(ng.FACE, int(i))) for i in sm.face_ids], np.int64)
    return cell, edge, face


def point_source_position(mesh: Mesh, settings: VerifySettings) -> np.ndarray:
    """(3,) source point, metres: outside the bounding box, beyond its maximum corner."""
    lo, hi = mesh.bounding_box
    diag = hi - lo
    return hi + settings.source_distance * diag


@dataclass(frozen=True)
class Solve:
    """One verification solve.

    label : "advised", "uniform p=3", ...
    cell_order : (n_cells,) int64 orders used.
    predicted : highest 1D-model error over the cells at these orders.
    errors : (n_dir,) measured relative L2 error per plane-wave direction.
    point_error : measured relative L2 error of the point source (NaN if not solved).
    dofs : global unknowns after static condensation (NGSolve's coupling dofs).
    ndof : all unknowns including cell interiors.
    seconds : wall time of assembly, factorisation, solves and error integrals.
    """

    label: str
    cell_order: np.ndarray
    predicted: float
    errors: np.ndarray
    point_error: float
    dofs: int
    ndof: int
    seconds: float

    @property
    def max_error(self) -> float:
        return float(self.errors.max())

    @property
    def median_error(self) -> float:
        return float(np.median(self.errors))

    @property
    def orders(self) -> tuple[int, int]:
        return int(self.cell_order.min()), int(self.cell_order.max())


@dataclass(frozen=True)
class Verification:
    """The advice at one frequency and what the solves measured.

    frequency : Hz; speed : m/s; k : rad/m; target : relative error allowed.
    advised : the solve at the advised orders; uniform : comparisons at uniform
    orders (highest advised order p, then p - 1); source : (3,) point-source
    position, m; directions : (n, 3).
    """

    frequency: float
    speed: float
    k: float
    target: float
    advised: Solve
    uniform: tuple[Solve, ...]
    directions: np.ndarray = field(repr=False)
    source: np.ndarray | None = None

    @property
    def meets_target(self) -> bool:
        """The worst plane wave at the advised orders is within the target."""
        return self.advised.max_error <= self.target

    @property
    def solves(self) -> tuple[Solve, ...]:
        return (self.advised,) + self.uniform


def advised_orders(advice: Advice) -> np.ndarray:
    """(n_cells,) int64 orders the advice asks for at ``advice.fmax``.

    Variable order: the lowest order meeting the target, capped at the maximum
    order (cells no order carries get the maximum).  Fixed order: that order.
    """
    s = advice.settings
    if s.order is not None:
        return np.full(len(advice.cell_order), s.order, np.int64)
    return np.minimum(advice.cell_order, s.max_order).astype(np.int64)


def predicted_errors(sm: SolverMesh, advice: Advice, cell_order: np.ndarray) -> np.ndarray:
    """(n_cells,) error the advisor's model predicts for each cell at the given orders.

    ``predicted_error(k a h, p, k L)`` at ``advice.fmax``: h the cell's longest edge,
    a the 3D correction of :func:`meshcheck.advice.size_correction` when
    ``advice.settings.correction_3d`` (``a h`` the largest over the cell's edges),
    L its propagation distance, p its order.
    """
    p = np.asarray(cell_order, np.int64)
    k = 2.0 * np.pi * advice.fmax / advice.cell_speed
    s = advice.settings
    corr = size_correction(sm.mesh, sm.topo, int(p.max()), s.target,
                           None if s.correction_3d else {})
    out = np.empty(len(p))
    for q in np.unique(p):
        sel = p == q
        h = sm.topo.edges.per_cell(sm.topo.edges.length * corr.at(int(q)), np.maximum)
        out[sel] = predicted_error(k[sel] * h[sel], int(q), k[sel] * advice.cell_distance[sel])
    return out


class _Quiet:
    """Silence NGSolve's messages and run its task manager while inside."""

    def __init__(self, ng):
        self.ng = ng

    def __enter__(self):
        self.level = self.ng.ngsglobals.msg_level
        self.ng.ngsglobals.msg_level = 0
        self.tm = self.ng.TaskManager()
        self.tm.__enter__()
        return self

    def __exit__(self, *exc):
        self.tm.__exit__(*exc)
        self.ng.ngsglobals.msg_level = self.level
        return False


def solve_orders(sm: SolverMesh, k: float, cell_order: np.ndarray,
                 settings: VerifySettings = VerifySettings(), source: np.ndarray | None = None,
                 label: str = "", predicted: float = float("nan")) -> Solve:
    """Solve the plane-wave (and point-source) problems at the given cell orders.

    k : wavenumber, rad/m.  cell_order : (n_cells,) int >= 1.  source : (3,)
    point-source position (m), outside the domain; None = no point source.
    One factorisation serves every right-hand side.
    """
    ng = require_ngsolve()
    if not (np.isfinite(k) and k > 0):
        raise SettingsError(f"wavenumber {k} rad/m must be positive")
    p = np.asarray(cell_order, np.int64)
    t0 = time.perf_counter()
    M = sm.ngmesh
    with _Quiet(ng):
        fes = order_space(sm, p)
        u, v = fes.TnT()
        a = ng.BilinearForm(fes, symmetric=True)
        a += (ng.grad(u) * ng.grad(v) - k * k * u * v) * ng.dx
        a += -1j * k * u * v * ng.ds
        a.Assemble()
        inv = a.mat.Inverse(fes.FreeDofs(), inverse=settings.solver)
        n = ng.specialcf.normal(3)
        X = ng.CoefficientFunction((ng.x, ng.y, ng.z))
        dpar = [ng.Parameter(0.0) for _ in range(3)]
        dvec = ng.CoefficientFunction(tuple(dpar))
        plane = ng.exp(1j * k * ng.InnerProduct(dvec, X))
        g_plane = 1j * k * (ng.InnerProduct(dvec, n) - 1.0) * plane
        order = settings.error_order or 2 * int(p.max()) + 4
        gfu = ng.GridFunction(fes)

        def run(g, exact, norm2):
            f = ng.LinearForm(fes)
            f += g * v * ng.ds(bonus_intorder=settings.data_bonus)
            f.Assemble()
            gfu.vec.data = inv * f.vec
            err2 = ng.Integrate(ng.Norm(gfu - exact) ** 2, M, order=order)
            return float(np.sqrt(max(err2, 0.0) / norm2))

        volume = ng.Integrate(ng.CoefficientFunction(1.0), M, order=1)
        errors = np.empty(len(settings.directions))
        for j, dj in enumerate(settings.directions):
            for par, val in zip(dpar, dj):
                par.Set(float(val))
            errors[j] = run(g_plane, plane, volume)
        point_error = float("nan")
        if source is not None:
            r_vec = X - ng.CoefficientFunction(tuple(float(s) for s in source))
            r = ng.sqrt(ng.InnerProduct(r_vec, r_vec))
            G = ng.exp(1j * k * r) / (4.0 * np.pi * r)
            dGdn = (ng.CoefficientFunction(1j * k) - 1.0 / r) * G * ng.InnerProduct(r_vec, n) / r
            g_point = dGdn - 1j * k * G
            norm2 = ng.Integrate(ng.Norm(G) ** 2, M, order=order)
            point_error = run(g_point, G, norm2)
        dofs = fes.FreeDofs(coupling=True).NumSet()
        ndof = fes.ndof
    return Solve(label, p, float(predicted), errors, point_error, int(dofs), int(ndof),
                 time.perf_counter() - t0)


def _uniform_speed(advice: Advice) -> float:
    c = advice.cell_speed
    if not len(c) or not np.all(c == c[0]):
        raise SettingsError("verification needs one sound speed in the whole fluid "
                            f"(found {np.min(c):.6g} to {np.max(c):.6g} m/s)")
    return float(c[0])


def verify(sm: SolverMesh, advice: Advice,
           settings: VerifySettings = VerifySettings()) -> Verification:
    """Solve at the advised orders (and uniform p, p - 1) at ``advice.fmax``.

    The measured errors are compared with ``advice.settings.target``; the
    prediction of each solve is the worst cell's 1D-model error at its order.
    ``sm`` is the solver mesh of the advised mesh (:func:`solver_mesh`).
    """
    c = _uniform_speed(advice)
    k = 2.0 * np.pi * advice.fmax / c
    source = point_source_position(sm.mesh, settings) if settings.point_source else None
    orders = advised_orders(advice)

    def one(p, label):
        pred = float(predicted_errors(sm, advice, p).max())
        return solve_orders(sm, k, p, settings, source, label, pred)

    adv = one(orders, "advised")
    uniform = []
    if settings.compare:
        top = int(orders.max())
        for q in (top, top - 1):
            if q < 1 or (q == top and np.all(orders == top)):
                continue
            uniform.append(one(np.full(len(orders), q, np.int64), f"uniform p={q}"))
    return Verification(advice.fmax, c, k, advice.settings.target, adv, tuple(uniform),
                        settings.directions, source)


def verification_dict(v: Verification, unit_scale: float = 1.0) -> dict:
    """JSON-ready summary of one frequency (lengths divided by ``unit_scale``)."""
    def solve(s: Solve) -> dict:
        lo, hi = s.orders
        return {"label": s.label, "order_min": lo, "order_max": hi,
                "order_counts": {str(q): int(n) for q, n in
                                 zip(*np.unique(s.cell_order, return_counts=True))},
                "predicted_error": s.predicted, "max_error": s.max_error,
                "median_error": s.median_error, "errors": s.errors.tolist(),
                "point_source_error": s.point_error if np.isfinite(s.point_error) else None,
                "dofs_condensed": s.dofs, "dofs_total": s.ndof, "seconds": s.seconds}

    return {"frequency_hz": v.frequency, "sound_speed_m_s": v.speed, "k_rad_m": v.k,
            "target_relative_error": v.target, "meets_target": v.meets_target,
            "directions": v.directions.tolist(),
            "point_source": None if v.source is None else (v.source / unit_scale).tolist(),
            "solves": [solve(s) for s in v.solves]}
