"""Validity of a mesh: what makes a Helmholtz solve on it wrong or impossible.

Each check returns :class:`Finding` records with the ids of the cells (or
nodes) concerned and their locations, so a meshing team can find them.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from . import kernels
from .jacobian import _gradient_table, compiled_extremes, remember_quadratic, scaled_jacobian_min
from .mesh import Mesh
from .topology import Topology

__all__ = ["Finding", "ValiditySettings", "check_validity", "min_scaled_jacobian"]

BLOCKING, WARNING, NOTE = "blocking", "warning", "note"


@dataclass(frozen=True)
class Finding:
    """One validity finding.

    code : short stable identifier (e.g. "inverted_cells").
    severity : "blocking" (the solve is wrong or impossible), "warning" or "note".
    message : one sentence for people.
    count : number of items concerned.
    ids : up to ``max_listed`` cell (or node) ids, 0-based.
    id_kind : "cell", "node" or "face".
    locations : (len(ids), 3) float64 metres.
    """

    code: str
    severity: str
    message: str
    count: int
    ids: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    id_kind: str = "cell"
    locations: np.ndarray = field(default_factory=lambda: np.zeros((0, 3)))


@dataclass(frozen=True)
class ValiditySettings:
    """Thresholds of the validity checks.

    degenerate_sj : |minimum scaled Jacobian| below this is a degenerate cell
        (common practice, no source: a cell that flat carries no stiffness).
    max_listed : how many ids a finding lists.
    """

    degenerate_sj: float = 1e-6
    max_listed: int = 20


def min_scaled_jacobian(mesh: Mesh, chunk: int = 200_000, out: np.ndarray | None = None,
                        known: tuple = ()) -> np.ndarray:
    """(n_cells,) minimum scaled Jacobian over corners and, for quadratic cells,
    over quadrature points (dimensionless; negative = inverted somewhere).

    Large meshes take the compiled kernel (one pass per cell over corners and
    quadrature points); for quadratic cells it also keeps the det J ratio and the
    mid-node deviation for :func:`meshcheck.curvature.quadratic_geometry`, which
    then needs no second pass.

    out : optional (n_cells,) float64 array written into and returned; the cells of the
        blocks whose type is in ``known`` hold their values there already and are
        skipped (e.g. :func:`meshcheck.quality.checked_quality`'s ``min_sj``).
    """
    compiled = kernels.use_compiled(mesh.n_cells)
    out = np.empty(mesh.n_cells) if out is None else out
    for b, lo in zip(mesh.blocks, mesh.block_offsets):
        if b.type not in known:
            out[lo:lo + len(b)] = (_compiled_block_sj(mesh.points, b) if compiled else
                                   _block_sj(mesh.points, b, chunk))
    return out


def _block_sj(points: np.ndarray, b, chunk: int) -> np.ndarray:
    """min_scaled_jacobian of the cells of block b by numpy, ``chunk`` cells at a time."""
    vals = np.empty(len(b))
    for s in range(0, len(b), chunk):
        cells = b.cells[s:s + chunk]
        v = scaled_jacobian_min(points, cells, b.type, "corners")
        if b.info.quadratic:
            v = np.minimum(v, scaled_jacobian_min(points, cells, b.type, "quadrature"))
        vals[s:s + chunk] = v
    return vals


def _compiled_block_sj(points: np.ndarray, b) -> np.ndarray:
    """min_scaled_jacobian of the cells of block b by the compiled kernel (the whole
    block, no chunks needed)."""
    if b.info.quadratic:
        table = _gradient_table(b.type, "corners", "quadrature")
        first_q = len(_gradient_table(b.type, "corners"))
        sj, ratio, dev = compiled_extremes(points, b.cells, table, first_q, b.info.edges)
        remember_quadratic(points, b.cells, ratio, dev)
        return sj
    return compiled_extremes(points, b.cells, _gradient_table(b.type, "corners"), None)[0]


def _cells(code, severity, message, mask_or_ids, mesh: Mesh, s: ValiditySettings):
    ids = np.flatnonzero(mask_or_ids) if mask_or_ids.dtype == bool else mask_or_ids
    shown = ids[:s.max_listed]
    return Finding(code, severity, message, int(len(ids)), shown, "cell",
                   mesh.centroids_of(shown))


def _nodes(code, severity, message, ids, mesh: Mesh, s: ValiditySettings):
    shown = ids[:s.max_listed]
    return Finding(code, severity, message, int(len(ids)), shown, "node", mesh.points[shown])


def check_validity(mesh: Mesh, topo: Topology, min_sj: np.ndarray,
                   settings: ValiditySettings = ValiditySettings()) -> list[Finding]:
    """All validity findings of a mesh (an empty list for a valid one)."""
    s = settings
    out: list[Finding] = []
    # non-finite coordinates of used nodes (the topology lists the unused ones: no pass
    # over the cells; a whole finite array, the usual case, takes one reduction)
    bad_xyz = np.zeros(0, np.int64)
    if not np.isfinite(mesh.points).all():
        bad_xyz = np.flatnonzero(~np.isfinite(mesh.points).all(axis=1))
        bad_xyz = bad_xyz[~np.isin(bad_xyz, topo.unused_nodes)]
    if len(bad_xyz):
        out.append(_nodes("nonfinite_coordinates", BLOCKING,
                          "nodes with NaN or infinite coordinates", bad_xyz, mesh, s))
    finite_sj = np.isfinite(min_sj)
    inverted = finite_sj & (min_sj < -s.degenerate_sj)
    if inverted.any():
        out.append(_cells("inverted_cells", BLOCKING,
                          "inverted cells (negative Jacobian at a corner or quadrature point)",
                          inverted, mesh, s))
    degenerate = (finite_sj & (np.abs(min_sj) <= s.degenerate_sj)) | (~finite_sj)
    if degenerate.any():
        out.append(_cells("degenerate_cells", BLOCKING,
                          "degenerate cells (zero volume or collapsed corner)", degenerate, mesh, s))
    if len(topo.duplicate_nodes):
        ids = np.unique(topo.duplicate_nodes.ravel())
        out.append(_nodes("duplicate_nodes", BLOCKING if len(topo.crack_faces) else WARNING,
                          "coincident nodes (unmerged duplicates)", ids, mesh, s))
    if len(topo.crack_faces):
        f = topo.crack_faces
        cells = topo.faces.cells[f, 0]
        out.append(Finding("internal_cracks", BLOCKING,
                           "boundary faces lying on other boundary faces: an unmerged interface "
                           "that blocks the wave (merge coincident nodes)", int(len(f)),
                           cells[:s.max_listed], "cell", mesh.centroids_of(cells[:s.max_listed])))
    if len(topo.duplicate_cells):
        out.append(_cells("duplicate_cells", BLOCKING, "cells repeated with the same corners",
                          topo.duplicate_cells[:, 1], mesh, s))
    if len(topo.nonmanifold_faces):
        cells = topo.faces.cells[topo.nonmanifold_faces, 0]
        out.append(_cells("nonmanifold_faces", BLOCKING,
                          "faces shared by more than two cells (overlapping cells)", cells, mesh, s))
    if len(topo.unused_nodes):
        out.append(_nodes("unused_nodes", NOTE, "nodes used by no cell (ignored)",
                          topo.unused_nodes, mesh, s))
    if topo.n_components > 1:
        first = np.unique(topo.component, return_index=True)[1]
        out.append(Finding("several_components", WARNING,
                           f"{topo.n_components} disconnected parts: no sound passes between them",
                           topo.n_components, first[:s.max_listed], "cell",
                           mesh.centroids_of(first[:s.max_listed])))
    return out
