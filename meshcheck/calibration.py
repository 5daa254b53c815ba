"""Machine constants for the cost of a sparse direct solve, fitted to real factorisations.

The cost of factorising a sparse matrix of N unknowns and nnz non-zeros that
comes from a mesh follows from nested-dissection theory (George, "Nested
dissection of a regular finite element mesh", SIAM J. Numer. Anal. 10 (1973)
345-363, 2D; Lipton, Rose & Tarjan, "Generalized nested dissection", SIAM J.
Numer. Anal. 16 (1979) 346-358, 2D and 3D): with separators of N^(1/2) (2D) or
N^(2/3) (3D) unknowns the factor holds O(N log N) / O(N^(4/3)) entries and
costs O(N^(3/2)) / O(N^2) operations.  Higher orders add dense element blocks
of ~nnz/N unknowns at the leaves of the dissection tree, which cost O(nnz) in
memory and O(N (nnz/N)^2) = O(nnz^2/N) in operations (the structure of the
estimates for p-FEM in Collier, Pardo, Dalcin, Paszynski & Calo, "The cost of
continuity", CMAME 213-216 (2012) -- cited from memory).  The dissection stops
at leaves, which truncates its sum over levels: sum_(l <= L) 2^l (N/2^l)^(4/3)
= C N^(4/3) (1 - (n0/N)^(1/3)) in 3D, N log2(N / n0) in 2D, a correction
proportional to N (it explains why the local growth of the factor measured at
1e3 - 4e4 unknowns is N^1.45..1.6 rather than N^(4/3)).  meshcheck therefore
fits, by non-negative least squares on relative errors,

    factor entries, factor memory, solve time  ~ c1 X1 + c2 nnz - c3 N
    factor operations, factor time             ~ c1 X2 + c2 nnz^2/N + c3 nnz - c4 N

with X1 = N^(4/3) (3D) or N log2 N (2D), X2 = N^2 (3D) or N^(3/2) (2D), and
assembly time ~ c1 cells + c2 sum(n_loc^2) + c3 sum(n_loc^3), n_loc = unknowns
of a cell (element-matrix entries; element-level condensation work).  The
spread of a fit is the root mean square and the maximum of ln(measured /
fitted) over the calibration samples.

Measurements (:func:`calibrate`): complex Helmholtz matrices K - k^2 M of
sub-meshes of increasing size, hierarchical H1 of orders 1..4 with interiors
condensed, assembled by NGSolve (single thread), restricted to the coupling
unknowns and factorised by SciPy's SuperLU (``scipy.sparse.linalg.splu``) in a
child process with one BLAS thread.  SuperLU has no nested-dissection
ordering of its own (its minimum-degree orderings give fill growing like
N^1.65 and operations like N^2.5 on these meshes, far from the theory), so
the unknowns are ordered by :func:`nested_dissection`: recursive coordinate
bisection of the cells (leaves of :data:`ND_LEAF` cells), every unknown
ordered after the two halves its cells fall in -- the interface unknowns of
a cut form its separator (George 1973's dissection of a finite-element mesh;
production solvers such as MUMPS or PARDISO get the same kind of ordering
from METIS).  Pivoting is static (no row interchanges, as in the
symmetric-indefinite modes of those solvers): SuperLU's threshold pivoting
swaps rows on these indefinite matrices and adds 40 % fill at 27k unknowns
and 5x with partial pivoting (measured on the enclosure sample), which no
dissection model can predict.  The calibration systems are lightly damped
(k^2 (1 + 0.01 i)) so that no pivot vanishes.

Factor entries are nnz(L) + nnz(U) - N; operations are counted from the
factor structure (sum over pivots of 2 l_k u_k + l_k, l_k / u_k the
off-diagonal entries of column k of L / row k of U; multiply-adds of the
elimination, without the 4x of complex arithmetic); time is the CPU time of
the child (equal to wall time with one thread on an idle machine); memory is
the rise of the child's peak resident set during the factorisation (Linux
``/proc/self/clear_refs``).

The fitted constants are a :class:`MachineModel`, stored as JSON
(``meshcheck calibrate`` writes one; a default measured on the development
machine ships in ``meshcheck/data/machine.json``).
"""
from __future__ import annotations

import datetime as _dt
import json
import math
import os
import platform
import subprocess
import sys
import tempfile
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Callable, Iterable

import numpy as np

from .errors import SettingsError
from .mesh import CellBlock, Mesh

__all__ = ["SOLVER", "Fit", "MachineModel", "Prediction", "fit_terms", "fit_power",
           "regressors", "load_machine", "save_machine", "default_machine_path",
           "user_machine_path", "Sample", "submesh", "to_ngsolve", "helmholtz_matrix",
           "measure_factorisation", "nested_dissection", "calibrate", "fit_machine",
           "reference_mesh", "measure"]

SOLVER = ("scipy.sparse.linalg.splu (SuperLU; SymmetricMode, static pivoting: "
          "diag_pivot_thresh=0) on the "
          "unknowns in meshcheck's nested-dissection order (recursive coordinate bisection of "
          "the cells, interface unknowns last; permc_spec=NATURAL), one BLAS thread")
SPLU_OPTIONS = dict(permc_spec="NATURAL", diag_pivot_thresh=0.0,
                    options=dict(SymmetricMode=True))
#: cells per leaf of the nested dissection
ND_LEAF = 8
_THREAD_VARS = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS",
                "BLIS_NUM_THREADS", "VECLIB_MAXIMUM_THREADS")

# ---------------------------------------------------------------------------
# regressors and fits

#: quantity -> regressor set
KINDS = {"fill": "memory", "factor_bytes": "memory", "solve_s": "memory",
         "flops": "work", "factor_s": "work", "assembly_s": "assembly"}


def regressors(set_name: str, dim: int, ndof, nnz, cells=None, entries=None,
               cubes=None) -> dict[str, np.ndarray]:
    """Regressor columns of one set ("memory", "work", "assembly") -> name -> (n,) float.

    A column whose name starts with "-" enters with a minus sign (its coefficient is
    still >= 0): the dissection stops at leaves, which truncates the sum over its
    levels by a term proportional to N.
    """
    N = np.asarray(ndof, dtype=float)
    Z = np.asarray(nnz, dtype=float)
    if set_name == "memory":
        lead = ("N^(4/3)", N ** (4.0 / 3.0)) if dim == 3 else ("N log2 N", N * np.log2(
            np.maximum(N, 2.0)))
        return {lead[0]: lead[1], "nnz": Z, "-N": -N}
    if set_name == "work":
        lead = ("N^2", N ** 2) if dim == 3 else ("N^(3/2)", N ** 1.5)
        dense = Z * Z / np.maximum(N, 1.0)
        return {lead[0]: lead[1], "nnz^2/N": dense, "nnz": Z, "-N": -N}
    if set_name == "assembly":
        return {"cells": np.asarray(cells, float), "sum n_loc^2": np.asarray(entries, float),
                "sum n_loc^3": np.asarray(cubes, float)}
    raise ValueError(f"unknown regressor set {set_name!r}")


@dataclass(frozen=True)
class Fit:
    """y ~ sum(coef[i] * X[terms[i]]), fitted on relative errors.

    log_sd, log_max : standard deviation and maximum of |ln(y / fitted)| over the
        ``n`` samples (the spread quoted with every prediction).
    """

    terms: tuple[str, ...]
    coef: tuple[float, ...]
    log_sd: float
    log_max: float
    n: int

    def predict(self, X: dict[str, np.ndarray]) -> np.ndarray:
        """Fitted value; never below a quarter of the positive terms (the negative
        truncation term is meant for systems above a few hundred unknowns)."""
        out, pos = 0.0, 0.0
        for t, c in zip(self.terms, self.coef):
            v = c * np.asarray(X[t], dtype=float)
            out = out + v
            if not t.startswith("-"):
                pos = pos + v
        return np.asarray(np.maximum(out, 0.25 * np.asarray(pos)), dtype=float)

    def band(self, value, k: float = 2.0) -> tuple[np.ndarray, np.ndarray]:
        """(low, high) = value * exp(-/+ k log_sd) (k = 2: about 95 % of the samples)."""
        f = math.exp(k * self.log_sd)
        v = np.asarray(value, dtype=float)
        return v / f, v * f

    def to_json(self) -> dict:
        return {"terms": list(self.terms), "coef": list(self.coef), "log_sd": self.log_sd,
                "log_max": self.log_max, "n": self.n}

    @classmethod
    def from_json(cls, d: dict) -> "Fit":
        return cls(tuple(d["terms"]), tuple(float(c) for c in d["coef"]), float(d["log_sd"]),
                   float(d["log_max"]), int(d["n"]))


def fit_terms(X: dict[str, np.ndarray], y: np.ndarray) -> Fit:
    """Non-negative least squares of y on the columns of X, minimising relative errors.

    X : name -> (n,) regressor; y : (n,) positive measurements.
    """
    from scipy.optimize import nnls

    y = np.asarray(y, dtype=float)
    names = tuple(X)
    A = np.column_stack([np.asarray(X[k], dtype=float) for k in names])
    ok = (y > 0) & np.all(np.isfinite(A), axis=1) & np.isfinite(y)
    if ok.sum() < len(names):
        raise SettingsError(f"need at least {len(names)} positive samples to fit, have {ok.sum()}")
    A, y = A[ok], y[ok]
    scale = np.abs(A).max(axis=0)
    scale[scale == 0] = 1.0
    coef, _ = nnls((A / scale) / y[:, None], np.ones(len(y)))
    coef = coef / scale
    fitted = A @ coef
    r = np.log(y / np.where(fitted > 0, fitted, np.nan))
    r = r[np.isfinite(r)]
    sd = float(np.sqrt(np.mean(r ** 2))) if len(r) else float("inf")
    return Fit(names, tuple(float(c) for c in coef), sd, float(np.abs(r).max()) if len(r)
               else float("inf"), int(len(y)))


def fit_power(x: np.ndarray, y: np.ndarray) -> tuple[float, float]:
    """Least-squares line through (ln x, ln y) -> (exponent, constant) of y = C x^e."""
    lx, ly = np.log(np.asarray(x, float)), np.log(np.asarray(y, float))
    e, c = np.polyfit(lx, ly, 1)
    return float(e), float(np.exp(c))


# ---------------------------------------------------------------------------
# the machine model


@dataclass(frozen=True)
class Prediction:
    """Predicted cost of one system (arrays broadcast over systems).

    factor_bytes : peak memory of the factorisation, bytes; factor_s, solve_s,
    assembly_s : seconds; *_band : (low, high) arrays from the fit's spread;
    fill : factor entries; flops : factor operations.
    """

    fill: np.ndarray
    flops: np.ndarray
    factor_bytes: np.ndarray
    factor_s: np.ndarray
    solve_s: np.ndarray
    assembly_s: np.ndarray
    bytes_band: tuple[np.ndarray, np.ndarray]
    time_band: tuple[np.ndarray, np.ndarray]
    assembly_band: tuple[np.ndarray, np.ndarray]


@dataclass(frozen=True)
class MachineModel:
    """Fitted constants of one machine and solver.

    fits : "<quantity><dim>" -> Fit for quantities fill, factor_bytes, solve_s,
        flops, factor_s (dim 2 and 3) and "assembly_s".
    exponents : "<quantity><dim>" -> {order: free log-log exponent vs N}, for information.
    """

    solver: str
    machine: dict
    created: str
    fits: dict[str, Fit]
    exponents: dict = field(default_factory=dict)
    samples: tuple[dict, ...] = ()
    source: str = ""

    def largest_calibrated(self, dim: int) -> int | None:
        """Most unknowns of a factorised calibration sample of that dimension."""
        n = [int(s["ndof"]) for s in self.samples
             if int(s.get("dim", 0)) == dim and int(s.get("fill", 0)) > 0]
        return max(n) if n else None

    def fit(self, quantity: str, dim: int | None = None) -> Fit:
        key = quantity if dim is None else f"{quantity}{dim}"
        if key not in self.fits:
            raise SettingsError(f"machine constants {self.source or ''} have no fit for {key}; "
                                "run `meshcheck calibrate`")
        return self.fits[key]

    def predict(self, dim: int, ndof, nnz, cells=None, entries=None, cubes=None,
                k: float = 2.0) -> Prediction:
        """Predicted cost of systems with ``ndof`` unknowns and ``nnz`` non-zeros.

        cells, entries, cubes : cells, sum of n_loc^2 and of n_loc^3 of the assembly
            (None -> no assembly time).  k : width of the bands in standard deviations.
        """
        dim = 3 if dim == 3 else 2
        mem = regressors("memory", dim, ndof, nnz)
        work = regressors("work", dim, ndof, nnz)
        f_fill, f_bytes = self.fit("fill", dim), self.fit("factor_bytes", dim)
        f_flops, f_time, f_solve = (self.fit("flops", dim), self.fit("factor_s", dim),
                                    self.fit("solve_s", dim))
        fill, fbytes = f_fill.predict(mem), f_bytes.predict(mem)
        flops, t_fac, t_sol = f_flops.predict(work), f_time.predict(work), f_solve.predict(mem)
        if cells is not None:
            f_asm = self.fit("assembly_s")
            asm = f_asm.predict(regressors("assembly", dim, ndof, nnz, cells, entries, cubes))
            asm_band = f_asm.band(asm, k)
        else:
            asm = np.zeros_like(np.asarray(t_fac, dtype=float))
            asm_band = (asm, asm)
        ft = math.exp(k * max(f_time.log_sd, f_solve.log_sd))
        return Prediction(fill, flops, fbytes, t_fac, t_sol, asm, f_bytes.band(fbytes, k),
                          ((t_fac + t_sol) / ft, (t_fac + t_sol) * ft), asm_band)

    def to_json(self) -> dict:
        return {"schema": "meshcheck-machine", "schema_version": 1, "solver": self.solver,
                "machine": self.machine, "created": self.created,
                "fits": {k: f.to_json() for k, f in self.fits.items()},
                "exponents": self.exponents, "samples": list(self.samples)}

    @classmethod
    def from_json(cls, d: dict, source: str = "") -> "MachineModel":
        if d.get("schema") != "meshcheck-machine":
            raise SettingsError(f"{source}: not a meshcheck machine-constants file")
        return cls(d["solver"], d.get("machine", {}), d.get("created", ""),
                   {k: Fit.from_json(v) for k, v in d["fits"].items()},
                   d.get("exponents", {}), tuple(d.get("samples", ())), source)


def default_machine_path() -> Path:
    """The shipped constants (measured on the development machine)."""
    return Path(__file__).resolve().parent / "data" / "machine.json"


def user_machine_path() -> Path:
    """Where ``meshcheck calibrate`` writes by default: $XDG_CONFIG_HOME/meshcheck/machine.json."""
    base = os.environ.get("XDG_CONFIG_HOME") or str(Path.home() / ".config")
    return Path(base) / "meshcheck" / "machine.json"


def load_machine(path: str | Path | None = None) -> MachineModel:
    """Machine constants: ``path``, else $MESHCHECK_MACHINE, else the user's calibration
    (:func:`user_machine_path`), else the shipped default."""
    cands = [path] if path is not None else [os.environ.get("MESHCHECK_MACHINE"),
                                             user_machine_path(), default_machine_path()]
    for p in cands:
        if p and Path(p).is_file():
            try:
                return MachineModel.from_json(json.loads(Path(p).read_text()), str(p))
            except (ValueError, KeyError, TypeError) as exc:
                raise SettingsError(f"{p}: unreadable machine constants ({exc}); run "
                                    "`meshcheck calibrate` again") from None
    raise SettingsError(f"no machine constants found (looked at {path or cands}); run "
                        "`meshcheck calibrate`")


def save_machine(model: MachineModel, path: str | Path) -> Path:
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(model.to_json(), indent=1))
    return path


# ---------------------------------------------------------------------------
# measurements


@dataclass(frozen=True)
class Sample:
    """One measured system: mesh dimension, cells, orders, sizes and costs (SI units)."""

    dim: int
    cells: int
    order: str
    ndof: int
    nnz: int
    entries: int
    cubes: int
    fill: int
    flops: float
    factor_bytes: float
    factor_s: float
    factor_wall_s: float
    solve_s: float
    assembly_s: float
    source: str = ""


def submesh(mesh: Mesh, topo, n_cells: int, seed_cell: int = 0) -> Mesh:
    """The first ``n_cells`` cells of a breadth-first walk from ``seed_cell`` through
    shared faces (3D) or edges (2D): a compact connected piece, points renumbered."""
    from scipy import sparse
    from scipy.sparse.csgraph import breadth_first_order

    n = mesh.n_cells
    if mesh.dim == 3:
        inner = topo.faces.count >= 2
        a, b = topo.faces.cells[inner, 0], topo.faces.cells[inner, 1]
    else:
        inc, st = topo.edges.incidence, topo.edges.incidence_starts
        first = np.repeat(inc[st], np.diff(np.append(st, len(inc))))
        a, b = first, inc
    g = sparse.coo_matrix((np.ones(len(a), np.int8), (a, b)), shape=(n, n)).tocsr()
    order = breadth_first_order(g, seed_cell, directed=False, return_predecessors=False)
    keep = np.zeros(n, bool)
    keep[order[:n_cells]] = True
    blocks, used = [], np.zeros(mesh.n_points, bool)
    for i, bl in enumerate(mesh.blocks):
        sel = keep[mesh.block_offsets[i]:mesh.block_offsets[i + 1]]
        if sel.any():
            blocks.append((bl, sel))
            used[bl.cells[sel]] = True
    new_id = np.cumsum(used) - 1
    out = tuple(CellBlock(bl.type, new_id[bl.cells[sel]], bl.region[sel]) for bl, sel in blocks)
    return Mesh(mesh.points[used], out, dict(mesh.region_names), mesh.dim, mesh.source, mesh.unit)


def to_ngsolve(mesh: Mesh, topo=None):
    """NGSolve mesh of the corner nodes of ``mesh`` (straight-sided cells); volume
    element i is meshcheck cell i.

    3D: the mesh of :func:`meshcheck.verify.solver_mesh` (one builder for both uses; its
    corner maps orient every cell positively in NGSolve, and its boundary faces, given
    as surface elements, add no unknowns).  2D (planar calibration meshes; verification
    is 3D only): triangles and quadrilaterals in the plane, whose meshio/VTK corner
    order is NGSolve's up to a cyclic shift, which keeps the orientation.
    topo : the mesh's :class:`~meshcheck.topology.Topology` (3D; built when None).
    """
    if mesh.dim == 3:
        from .topology import build_topology
        from .verify import solver_mesh

        return solver_mesh(mesh, topo if topo is not None else build_topology(mesh)).ngmesh
    import netgen.meshing as nm
    import ngsolve as ngs

    m = nm.Mesh(dim=2)
    m.AddPoints(np.ascontiguousarray(mesh.points[:, :2]))
    m.Add(nm.FaceDescriptor(bc=1, domin=1, surfnr=1))
    for b in mesh.blocks:
        c = np.ascontiguousarray(b.cells[:, :b.info.n_corners].astype(np.int32))
        m.AddElements(dim=2, index=1, data=c, base=0)
    return ngs.Mesh(m)


def _set_orders(fes, ngmesh, cell_order: np.ndarray) -> None:
    """Hierarchical orders: cells as given, edges and faces by the maximum rule."""
    import ngsolve as ngs

    q = np.asarray(cell_order, dtype=np.int64)
    if np.all(q == q[0]):
        return
    edge = np.ones(ngmesh.nedge, np.int64)
    face = np.ones(ngmesh.nface, np.int64)
    for el in ngmesh.Elements(ngs.VOL):
        o = int(q[el.nr])
        fes.SetOrder(ngs.NodeId(ngs.ELEMENT, el.nr), o)
        for e in el.edges:
            edge[e.nr] = max(edge[e.nr], o)
        if ngmesh.dim == 3:
            for f in el.faces:
                face[f.nr] = max(face[f.nr], o)
    for i, o in enumerate(edge):
        fes.SetOrder(ngs.NodeId(ngs.EDGE, i), int(o))
    if ngmesh.dim == 3:
        for i, o in enumerate(face):
            fes.SetOrder(ngs.NodeId(ngs.FACE, i), int(o))
    fes.Update()


def helmholtz_matrix(ngmesh, cell_order, k: float, condensed: bool = True,
                     loss: float = 0.01):
    """Assemble K - k^2 (1 + i loss) M (complex symmetric; the light damping keeps
    every pivot away from zero under static pivoting) with NGSolve.

    Returns (A, dof_cells, seconds): A the csc matrix of the coupling unknowns,
    dof_cells the (n_unknowns, n_cells) csr incidence of every unknown with the
    cells whose closure holds it, seconds the assembly CPU time.
    """
    import ngsolve as ngs
    from scipy import sparse

    q = np.broadcast_to(np.asarray(cell_order, dtype=np.int64), (ngmesh.ne,))
    fes = ngs.H1(ngmesh, order=int(q.max()), complex=True)
    _set_orders(fes, ngmesh, q)
    u, v = fes.TnT()
    a = ngs.BilinearForm(fes, condense=condensed)
    a += (ngs.grad(u) * ngs.grad(v) - k * k * (1 + 1j * loss) * u * v) * ngs.dx
    t0 = time.process_time()
    a.Assemble()
    t_asm = time.process_time() - t0
    free = np.flatnonzero(np.array(list(fes.FreeDofs(coupling=condensed)), bool))
    r, c, vals = a.mat.COO()
    n = fes.ndof
    A = sparse.csr_matrix((np.asarray(vals), (np.asarray(r), np.asarray(c))), shape=(n, n))
    dofs, cells = [], []
    for el in ngmesh.Elements(ngs.VOL):
        d = fes.GetDofNrs(el)
        dofs.extend(d)
        cells.extend([el.nr] * len(d))
    dofs, cells = np.asarray(dofs, np.int64), np.asarray(cells, np.int64)
    ok = dofs >= 0
    inc = sparse.csr_matrix((np.ones(int(ok.sum()), np.int8), (dofs[ok], cells[ok])),
                            shape=(n, ngmesh.ne))
    if len(free) < n:
        A = A[free][:, free]
        inc = inc[free]
    return A.tocsc(), inc.tocsr(), t_asm


def _bisection_paths(points: np.ndarray, leaf: int,
                     weights: np.ndarray | None = None) -> tuple[np.ndarray, int]:
    """Recursive coordinate bisection: every part is halved at the weighted median of
    its longest bounding-box side until it holds at most ``leaf`` points.

    weights : (n,) positive, e.g. unknowns per cell (None = 1 each).
    Returns (paths, depth): (n,) int64 bit strings, most significant bit = first cut
    (parts that stop early are padded with zeros).
    """
    n = len(points)
    w_all = np.ones(n) if weights is None else np.asarray(weights, dtype=float)
    depth = max(1, int(np.ceil(np.log2(max(n / max(leaf, 1), 2.0)))) + 1)
    path = np.zeros(n, np.int64)
    label = np.zeros(n, np.int64)
    active = np.ones(n, bool)
    for _ in range(depth):
        side = np.zeros(n, np.int64)
        idx = np.flatnonzero(active)
        if len(idx):
            _, inv, cnt = np.unique(label[idx], return_inverse=True, return_counts=True)
            big = cnt[inv] > leaf
            active[idx[~big]] = False
            idx, inv = idx[big], inv[big]
        if len(idx):
            order = np.argsort(inv, kind="stable")
            g = inv[order]
            starts = np.flatnonzero(np.r_[True, g[1:] != g[:-1]])
            size = np.diff(np.append(starts, len(order)))
            x = points[idx[order]]
            lo = np.minimum.reduceat(x, starts, axis=0)
            hi = np.maximum.reduceat(x, starts, axis=0)
            grp = np.repeat(np.arange(len(starts)), size)
            val = x[np.arange(len(x)), np.argmax(hi - lo, axis=1)[grp]]
            o2 = np.lexsort((val, grp))
            # weighted median: a point goes right when the weight before its middle
            # reaches half of the part's weight (at least one point on each side)
            w = w_all[idx[order]][o2]
            csum = np.cumsum(w)
            gs = grp[o2]
            first = starts[gs]
            before = csum - w - (csum[first] - w[first])
            total = np.add.reduceat(w, starts)[gs]
            rank = np.arange(len(o2)) - first
            right = (before + 0.5 * w >= 0.5 * total) & (rank > 0)
            right |= rank == size[gs] - 1
            s_sorted = np.empty(len(o2), np.int64)
            s_sorted[o2] = right
            side[idx[order]] = s_sorted
        path = (path << 1) | side
        label = label * 2 + side
    return path, depth


def nested_dissection(cell_points: np.ndarray, dof_cells, leaf: int = ND_LEAF) -> np.ndarray:
    """Nested-dissection order of the unknowns of a mesh.

    cell_points : (n_cells, 3) cell centroids; dof_cells : (n_unknowns, n_cells)
    sparse incidence (cells whose closure holds each unknown).  The cells are cut
    by recursive coordinate bisection, balancing the unknowns on either side (an
    unknown counts 1/k in each of its k cells); an unknown whose cells all lie in
    one leaf belongs to that leaf, otherwise to the separator of the deepest cut
    that still holds all its cells, and separators follow the two halves they divide.
    Returns (n_unknowns,) int64 permutation (new position -> old unknown).
    """
    from scipy import sparse

    inc = sparse.csr_matrix(dof_cells)
    counts = np.diff(inc.indptr)
    if np.any(counts == 0):
        raise SettingsError("every unknown must belong to a cell")
    # weight of a cell: its unknowns, each shared equally among the cells holding it
    share = np.repeat(1.0 / counts, counts)
    weights = np.bincount(inc.indices, share, minlength=inc.shape[1])
    path, depth = _bisection_paths(np.asarray(cell_points, float), leaf,
                                   np.maximum(weights, 1e-12))
    pc = path[inc.indices]
    start = inc.indptr[:-1]
    pmin = np.minimum.reduceat(pc, start)
    pmax = np.maximum.reduceat(pc, start)
    diff = pmin ^ pmax
    bitlen = np.where(diff > 0, np.floor(np.log2(np.maximum(diff, 1))).astype(np.int64) + 1, 0)
    common = depth - bitlen
    shifts = np.arange(depth - 1, -1, -1)
    bits = (pmin[:, None] >> shifts[None, :]) & 1
    digits = np.zeros((len(pmin), depth + 1), np.int64)
    digits[:, :depth] = np.where(np.arange(depth)[None, :] < common[:, None], bits, 0)
    sep = common < depth
    digits[np.flatnonzero(sep), common[sep]] = 2
    key = digits @ (3 ** np.arange(depth, -1, -1, dtype=np.int64))
    return np.argsort(key, kind="stable")


_CHILD = r"""
import json, re, sys, time
import numpy as np
from scipy import sparse
from scipy.sparse.linalg import splu

def status(key):
    try:
        return 1024 * int(re.search(key + r":\s+(\d+)", open("/proc/self/status").read()).group(1))
    except OSError:
        return None

A = sparse.load_npz(sys.argv[1]).tocsc()
opts = json.loads(sys.argv[3])
try:
    with open("/proc/self/clear_refs", "w") as fh:
        fh.write("5")
    reset = True
except OSError:
    reset = False
rss0 = status("VmRSS")
t0, w0 = time.process_time(), time.perf_counter()
lu = splu(A, **opts)
t_fac, w_fac = time.process_time() - t0, time.perf_counter() - w0
peak = status("VmHWM") if reset else None
b = np.ones(A.shape[0], dtype=A.dtype)
t0 = time.process_time()
lu.solve(b)
t_sol = time.process_time() - t0
L = lu.L.tocsc()
U = lu.U.tocsr()
lc = np.diff(L.indptr).astype(float) - 1.0
ur = np.diff(U.indptr).astype(float) - 1.0
out = {"fill": int(L.nnz + U.nnz - A.shape[0]), "flops": float(np.sum(2.0 * lc * ur + lc)),
       "factor_s": t_fac, "factor_wall_s": w_fac, "solve_s": t_sol,
       "factor_bytes": (peak - rss0) if (peak is not None and rss0 is not None) else None}
json.dump(out, open(sys.argv[2], "w"))
"""


def measure_factorisation(A, perm: np.ndarray | None = None,
                          timeout: float | None = None) -> dict:
    """Factorise the sparse matrix A (symmetrically permuted by ``perm``, e.g. from
    :func:`nested_dissection`) with SuperLU in a fresh child process.

    Returns fill (entries of L + U - N), flops, factor_s (CPU), factor_wall_s,
    solve_s (one right-hand side, CPU) and factor_bytes (rise of the peak resident
    set, None where the OS cannot tell).
    """
    from scipy import sparse

    env = dict(os.environ)
    for v in _THREAD_VARS:
        env[v] = "1"
    opts = {"permc_spec": SPLU_OPTIONS["permc_spec"],
            "diag_pivot_thresh": SPLU_OPTIONS["diag_pivot_thresh"],
            "options": SPLU_OPTIONS["options"]}
    A = sparse.csc_matrix(A)
    if perm is not None:
        A = A[perm][:, perm].tocsc()
    with tempfile.TemporaryDirectory(prefix="meshcheck-cal-") as tmp:
        src, dst = Path(tmp) / "A.npz", Path(tmp) / "out.json"
        sparse.save_npz(src, A, compressed=False)
        proc = subprocess.run([sys.executable, "-c", _CHILD, str(src), str(dst), json.dumps(opts)],
                              env=env, capture_output=True, text=True, timeout=timeout)
        if proc.returncode != 0 or not dst.is_file():
            raise SettingsError("calibration factorisation failed: "
                                + (proc.stderr.strip().splitlines() or ["no output"])[-1])
        return json.loads(dst.read_text())


def reference_mesh(dim: int = 3, size: float = 0.03) -> Mesh:
    """Unstructured gmsh mesh (Delaunay, one thread, fixed seed) of the box
    1 x 0.8 x 0.6 m (3D, tets) or the rectangle 1 x 0.8 m (2D, triangles) with
    uniform target size ``size`` (m), as a meshcheck Mesh."""
    from .gmsh_mesh import generate

    def build(gmsh):
        gmsh.model.add("reference")
        if dim == 3:
            gmsh.model.occ.addBox(0, 0, 0, 1.0, 0.8, 0.6)
        else:
            gmsh.model.occ.addRectangle(0, 0, 0, 1.0, 0.8)
        gmsh.model.occ.synchronize()

    return generate(build, dim, {"Mesh.MeshSizeMin": size, "Mesh.MeshSizeMax": size,
                                 "Mesh.MeshSizeFromPoints": 0, "Mesh.MeshSizeFromCurvature": 0},
                    f"gmsh box size={size:g} m")


def measure(mesh: Mesh, cell_order, k: float | None = None, condensed: bool = True,
            factorise: bool = True, topo=None, label: str = "") -> Sample:
    """Assemble (NGSolve) and factorise (SuperLU, nested-dissection order) the Helmholtz
    system of ``mesh`` at ``cell_order`` (int or (n_cells,)); k defaults to 1 / median
    edge length.  The assembled size and non-zeros must equal meshcheck's exact counts
    (SettingsError otherwise).  factorise=False times the assembly only."""
    from .cost import system_size
    from .topology import build_topology

    topo = topo if topo is not None else build_topology(mesh)
    s = system_size(mesh, topo, cell_order, condensed)
    q = np.broadcast_to(np.asarray(cell_order, dtype=np.int64), (mesh.n_cells,))
    if k is None:
        h = float(np.median(topo.edges.length)) if len(topo.edges) else 1.0
        k = 1.0 / h
    ngm = to_ngsolve(mesh, topo)
    A, inc, t_asm = helmholtz_matrix(ngm, q, k, condensed)
    if A.shape[0] != s.ndof or A.nnz != s.nnz:
        raise SettingsError(f"assembled system ({A.shape[0]} unknowns, {A.nnz} non-zeros) "
                            f"differs from the count ({s.ndof}, {s.nnz})")
    r = measure_factorisation(A, nested_dissection(mesh.centroids, inc)) if factorise else {}
    qs = np.unique(q)
    order = str(int(qs[0])) if len(qs) == 1 else f"{int(qs.min())}-{int(qs.max())}"
    return Sample(mesh.dim, mesh.n_cells, order, s.ndof, s.nnz, s.cell_entries, s.cell_cubes,
                  int(r.get("fill", 0)), float(r.get("flops", 0.0)),
                  float(r["factor_bytes"]) if r.get("factor_bytes") is not None else float("nan"),
                  float(r.get("factor_s", float("nan"))), float(r.get("factor_wall_s",
                                                                       float("nan"))),
                  float(r.get("solve_s", float("nan"))), float(t_asm), label)


def _plan(mesh: Mesh, topo, orders: Iterable[int], min_dofs: float, max_dofs: float,
          steps: int) -> list[tuple[int, int]]:
    """(order, cells) pairs giving about geometric unknown counts per order."""
    from .cost import system_size

    out = []
    for p in orders:
        per_cell = system_size(mesh, topo, p, True).ndof / max(mesh.n_cells, 1)
        for n in np.geomspace(min_dofs, max_dofs, steps):
            cells = int(min(mesh.n_cells, max(8, round(n / per_cell))))
            if (p, cells) not in out:
                out.append((p, cells))
    return out


def calibrate(mesh: Mesh | None = None, orders=(1, 2, 3, 4), min_dofs: float = 800,
              max_dofs: float = 30000, steps: int = 6, dims=(3, 2),
              assembly_orders=(1, 2, 3, 4, 5, 6, 7, 8), assembly_dofs: float = 20000,
              progress: Callable[[str], None] | None = None) -> list[Sample]:
    """Measure factorisations of sub-meshes of ``mesh`` (default: the gmsh box meshes of
    :func:`reference_mesh`, sized so that order 1 reaches about ``max_dofs``).

    For every order, sub-meshes with about ``min_dofs`` .. ``max_dofs`` unknowns
    (``steps`` sizes, geometric) are assembled and factorised; assembly alone is
    timed for ``assembly_orders`` on sub-meshes of about min(``assembly_dofs``,
    ``max_dofs``) unknowns.  ``dims`` (without a mesh): which reference meshes to use.
    Returns the samples (see :func:`fit_machine`).
    """
    from .topology import build_topology

    say = progress or (lambda s: None)
    sources = [mesh] if mesh is not None else [
        reference_mesh(d, (0.025 if d == 3 else 0.006) * (30000 / max_dofs) ** (1.0 / d))
        for d in dims]
    samples = []
    for src in sources:
        topo = build_topology(src)
        seed = int(np.argmin(np.linalg.norm(src.centroids - src.centroids.mean(0), axis=1)))
        plan = [(p, c, True) for p, c in _plan(src, topo, orders, min_dofs, max_dofs, steps)]
        n_asm = min(assembly_dofs, max_dofs)
        plan += [(p, c, False) for p, c in _plan(src, topo, assembly_orders, n_asm, n_asm, 1)]
        for p, cells, fac in plan:
            sub = submesh(src, topo, cells, seed)
            say(f"{src.dim}D order {p}: {sub.n_cells} cells" + ("" if fac else " (assembly)"))
            samples.append(measure(sub, p, factorise=fac, label=src.source))
    return samples


def _machine_info() -> dict:
    import scipy

    cpu = platform.processor() or platform.machine()
    try:
        for line in open("/proc/cpuinfo"):
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    return {"cpu": cpu, "cores": os.cpu_count(), "python": platform.python_version(),
            "scipy": scipy.__version__, "numpy": np.__version__, "platform": platform.platform()}


def fit_machine(samples: list[Sample]) -> MachineModel:
    """Fit every quantity of :data:`KINDS` per dimension; free exponents per order."""
    fits, exps = {}, {}
    rows = [asdict(s) for s in samples]
    for dim in (2, 3):
        fac = [s for s in samples if s.dim == dim and s.fill > 0]
        if not fac:
            continue
        N = np.array([s.ndof for s in fac], float)
        Z = np.array([s.nnz for s in fac], float)
        for q, kind in KINDS.items():
            if kind == "assembly":
                continue
            y = np.array([getattr(s, q) for s in fac], float)
            ok = np.isfinite(y) & (y > 0)
            if ok.sum() < 3:
                continue
            X = {k: v[ok] for k, v in regressors(kind, dim, N, Z).items()}
            fits[f"{q}{dim}"] = fit_terms(X, y[ok])
            per = {}
            for o in sorted({s.order for s in fac}):
                sel = ok & np.array([s.order == o for s in fac])
                if sel.sum() >= 3:
                    per[o] = round(fit_power(N[sel], y[sel])[0], 3)
            exps[f"{q}{dim}"] = per
    asm = [s for s in samples if np.isfinite(s.assembly_s) and s.assembly_s > 0]
    if len(asm) >= 3:
        X = regressors("assembly", 3, [s.ndof for s in asm], [s.nnz for s in asm],
                       [s.cells for s in asm], [s.entries for s in asm], [s.cubes for s in asm])
        fits["assembly_s"] = fit_terms(X, np.array([s.assembly_s for s in asm]))
    created = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
    return MachineModel(SOLVER, _machine_info(), created, fits, exps, tuple(rows))
