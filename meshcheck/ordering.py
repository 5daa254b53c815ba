"""Renumbering a mesh so that neighbours sit near each other in memory.

Mesh generators often write cells in an order unrelated to their nodes, and nodes in
an order unrelated to space (in the benchmark's 4.77M-tet gmsh mesh the cells around a
node span a median 3.5M of the cell ids), so every per-cell pass that reads node- or
edge-indexed data reads at random. :func:`renumbered` gives the same mesh with

* the points in Morton (Z-order) sequence: the order of their quantised coordinates'
  interleaved bits (G. M. Morton, 1966, "A computer oriented geodetic data base and a
  new technique in file sequencing", IBM Ltd., Ottawa), with 21 bits per axis on the
  bounding cube;
* the cells of each block sorted by their lowest renumbered corner (a stable counting
  sort, so that cells with the same lowest corner keep the file's order), region runs
  kept together.

The renumbered mesh keeps the file's numbers (``Mesh.file_point_ids``,
``Mesh.file_cell_ids``): the Python API's arrays index the renumbered mesh, and the
reports give every cell and node id in the file's numbering. Measured on the
benchmark's meshes (docs/performance.md): the audit's analysis 4.0 -> 2.8 s at 4.77M
tets when the file itself is in this order. A file already in an order that keeps
neighbours together (e.g. a structured grid, row by row) gains nothing and can lose
(a 1M-hexahedron grid: analysis 1.36 -> 1.55 s), so :func:`renumbered_for_audit` first
measures the file's :func:`locality`.
"""
from __future__ import annotations

import dataclasses
import os
import tempfile
import threading
import time
import warnings

import numpy as np

from . import kernels
from .advice import region_runs
from .mesh import CellBlock, Mesh
from .threads import MAX_WORKERS, ranges, thread_map

__all__ = ["RENUMBER_CELLS", "RENUMBER_CELLS_JIT", "POOR_LOCALITY", "SPILL_CELLS",
           "SpilledIds", "morton_keys", "point_order", "sorted_cells", "renumbered",
           "locality", "renumbered_for_audit"]

#: meshes with at least this many cells are renumbered before an audit of a file (the
#: size from which the compiled kernels serve, :data:`meshcheck.kernels.MIN_CELLS`)
RENUMBER_CELLS = kernels.MIN_CELLS

#: a mesh is renumbered when, over a sample of its largest block's cells, the median
#: span of a cell's corner ids or the median step between the lowest corners of
#: consecutive cells is at least this fraction of the number of points. Measured
#: (docs/performance.md, sixteenth session): gmsh's 1M linear tets 0.28 and 0.12
#: (renumbered: analysis 0.75 -> 0.64 s); its 1M quadratic tets 0.042 and 0.017 (as fast
#: either way); the structured 1M hexahedra 0.0067 and 0 (renumbered: 1.36 -> 1.55 s)
POOR_LOCALITY = 0.05

#: without the kernels' built module (numba's cache serves them, each loaded on first
#: use) meshes are renumbered from this many cells only: at 966k tets renumbering then
#: saved 0.05 s of a 1.5 s audit (6 alternating runs, medians 1.47 against 1.52 s) but
#: loading its six kernels raised the peak by 5 MiB (301-305 against 296-300 MiB, over
#: the 300 MiB target), 2026-12-04
RENUMBER_CELLS_JIT = 2_000_000

#: renumbered meshes with at least this many cells keep the file's numbers in a temporary
#: file (:class:`SpilledIds`) while they are audited: only the reports read them, and
#: at 4.77M tets they are 21 MiB of the audit's peak (the advice stage's, numba's cache:
#: 1,017-1,021 -> 990-1,000 MiB with the numbers dropped, 3 fresh runs each,
#: 2026-12-04). Below it the arrays stay in memory (the reports then gather faster)
SPILL_CELLS = 2_000_000

#: cells sampled by :func:`locality`
LOCALITY_SAMPLE = 4096

#: bits per axis of the Morton keys (3 x 21 = 63 bits of a uint64)
MORTON_BITS = 21


def _spread(x: np.ndarray) -> np.ndarray:
    """The low 21 bits of uint64 ``x`` moved to bit positions 0, 3, 6, ... (in place)."""
    x &= np.uint64(0x1FFFFF)
    for shift, mask in ((32, 0x1F00000000FFFF), (16, 0x1F0000FF0000FF),
                        (8, 0x100F00F00F00F00F), (4, 0x10C30C30C30C30C3),
                        (2, 0x1249249249249249)):
        x |= x << np.uint64(shift)
        x &= np.uint64(mask)
    return x


def morton_keys(points: np.ndarray) -> np.ndarray:
    """(n,) uint64 Morton keys of (n, 3) ``points``: each coordinate quantised to 21 bits
    on the bounding cube of the finite coordinates (non-finite ones count as the cube's
    lower corner), bits interleaved x, y, z from the lowest."""
    p = np.asarray(points, dtype=np.float64)
    keys = np.zeros(len(p), np.uint64)
    if not len(p):
        return keys
    top = float((1 << MORTON_BITS) - 1)
    if kernels.use_compiled(len(p)):
        from .kernels import ordering as ko
        lo, hi = np.empty(3), np.empty(3)
        ko.bounds(p, lo, hi)  # of the finite ones; an axis without any: +-inf -> 0
        lo[~np.isfinite(lo)], hi[~np.isfinite(hi)] = 0.0, 0.0
        ko.morton_keys(p, lo, _scale(lo, hi, top), top, keys)
        return keys
    lo, hi = p.min(axis=0), p.max(axis=0)
    if not (np.isfinite(lo).all() and np.isfinite(hi).all()):  # bounds of the finite ones
        fin = np.where(np.isfinite(p), p, np.nan)
        with warnings.catch_warnings():  # an axis without any: numpy warns, NaN -> 0
            warnings.simplefilter("ignore", RuntimeWarning)
            lo, hi = np.nan_to_num(np.nanmin(fin, axis=0)), np.nan_to_num(np.nanmax(fin, axis=0))
    scale = _scale(lo, hi, top)
    for d in range(3):
        with np.errstate(invalid="ignore"):
            q = (p[:, d] - lo[d]) * scale
        q = np.clip(np.where(np.isfinite(q), q, 0.0), 0.0, top).astype(np.uint64)
        keys |= _spread(q) << np.uint64(d)
    return keys


def _scale(lo: np.ndarray, hi: np.ndarray, top: float) -> float:
    """Quantisation factor: the bounding cube's side maps to ``top``."""
    span = float((hi - lo).max())
    return top / span if span > 0 else 0.0


def point_order(points: np.ndarray) -> np.ndarray:
    """(n,) int64 old index of each new point: the points sorted by :func:`morton_keys`,
    stably (equal keys in the points' order; compiled: a radix sort, 810k points 0.054
    -> about 0.015 s)."""
    keys = morton_keys(points)
    if kernels.use_compiled(len(keys)) and len(keys):
        from .kernels import ordering as ko
        order = np.empty(len(keys), np.int64)
        ko.radix_argsort(keys, order)
        return order
    return np.argsort(keys, kind="stable")


def _groups(region: np.ndarray) -> np.ndarray | None:
    """(m,) int64 group of each cell so that sorting by it keeps the region runs
    (:func:`meshcheck.advice.region_runs`) in their order (regions interleaved in more
    than 256 runs: the region's rank), or None for one run."""
    if region.strides == (0,) or len(region) < 2:
        return None
    runs = region_runs(region)
    if runs is None:
        return np.unique(region, return_inverse=True)[1].reshape(-1)
    bounds = sorted(r for rs in runs.values() for r in rs)
    if len(bounds) < 2:
        return None
    return np.repeat(np.arange(len(bounds)), [hi - lo for lo, hi in bounds])


def sorted_cells(cells: np.ndarray, n_corners: int, new_id: np.ndarray, n_points: int,
                 region: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """(new_id[cells[order]], order): the rows of ``cells`` (m, n) sorted by their lowest
    ``new_id`` over the first ``n_corners`` nodes, stably, with their nodes' new numbers;
    rows of one region run (see :func:`_groups`) stay together, runs in the file's order.
    ``order`` (m,) is the old row of each new row, int32 below 2**31 rows.

    Compiled: a counting sort whose two passes (count, then place each row relabelled)
    each take half the rows on each thread."""
    m = len(cells)
    idx = np.int32 if m < 2**31 else np.int64
    groups = _groups(region) if region is not None else None
    if kernels.use_compiled(m) and m:
        from .kernels import ordering as ko
        parts = _halves(m)
        counts = np.zeros((len(parts), n_points), idx)
        thread_map(lambda q: ko.lowest_corner_counts(cells, n_corners, new_id, counts[q],
                                                     *parts[q]),
                   range(len(parts)), parallel=len(parts) > 1)
        ko.part_starts(counts)
        out = np.empty(cells.shape, new_id.dtype)
        order = np.empty(m, idx)
        thread_map(lambda q: ko.scatter_rows(cells, n_corners, new_id, counts[q], out, order,
                                             *parts[q]),
                   range(len(parts)), parallel=len(parts) > 1)
        del counts
    else:
        keys = new_id[cells[:, :n_corners]].min(axis=1) if m else np.zeros(0, np.int64)
        order = np.argsort(keys, kind="stable").astype(idx)
        out = new_id[cells[order]]
    if groups is not None:  # a radix sort (numpy's stable sort of 8- and 16-bit keys)
        small = np.uint8 if groups.max() < 256 else np.uint16 if groups.max() < 65536 else None
        g = groups[order]
        again = np.argsort(g if small is None else g.astype(small), kind="stable")
        order, out = order[again], out[again]
    return out, order


def _halves(m: int) -> list[tuple[int, int]]:
    """Two row ranges of ``m`` rows for the two threads (one when it is small)."""
    return ranges(m, 2 if m >= 2 * kernels.MIN_CELLS and MAX_WORKERS > 1 else 1)


def _points(points: np.ndarray, old: np.ndarray) -> np.ndarray:
    """points[old] (compiled: in one pass, its halves on two threads)."""
    if kernels.use_compiled(len(points)) and len(points):
        from .kernels import ordering as ko
        out = np.empty_like(points)
        parts = ranges(len(old), 2 if MAX_WORKERS > 1 else 1)
        thread_map(lambda r: ko.gather_rows(points, old, out, r[0], r[1]), parts,
                   parallel=len(parts) > 1)
        return out
    return points[old]


def renumbered(mesh: Mesh) -> Mesh:
    """The same mesh with points in Morton order and each block's cells sorted by their
    lowest renumbered corner (see the module's docstring). ``file_point_ids`` and
    ``file_cell_ids`` of the result give the file's number of every point and cell
    (composed with the input's own, if it was renumbered already)."""
    n = mesh.n_points
    old = point_order(mesh.points)
    idx = np.int32 if n < 2**31 else np.int64
    new_id = np.empty(n, idx)
    new_id[old] = np.arange(n, dtype=idx)
    blocks, file_cells = [], []
    # the points' gather first, on both cores (on a third thread beside the cells' sort it
    # took a core from one of the sort's halves, whose ends then differed by 0.04 s)
    points = _points(mesh.points, old)
    for b, start in zip(mesh.blocks, mesh.block_offsets):
        cells, order = sorted_cells(b.cells, b.info.n_corners, new_id, n, b.region)
        region = b.region if b.region.strides == (0,) else b.region[order]
        blocks.append(CellBlock(b.type, cells, region))
        file_cells.append(order if start == 0 else order + start)
        del order
    cidx = np.int32 if mesh.n_cells < 2**31 else np.int64
    file_cells = (file_cells[0] if len(file_cells) == 1 else np.concatenate(file_cells)
                  if file_cells else np.zeros(0)).astype(cidx, copy=False)
    if mesh.file_cell_ids is not None:
        file_cells = mesh.file_cell_ids[file_cells]
    file_points = old.astype(idx)
    if mesh.file_point_ids is not None:
        file_points = mesh.file_point_ids[file_points]
    return Mesh(points, tuple(blocks), dict(mesh.region_names), mesh.dim,
                mesh.source, mesh.unit, dict(mesh.material_speeds), mesh.notes,
                file_point_ids=file_points, file_cell_ids=file_cells)


def locality(mesh: Mesh) -> tuple[float, float]:
    """(median span of a cell's corner ids, median step between the lowest corners of
    consecutive cells), each over :data:`LOCALITY_SAMPLE` evenly spaced cells of the
    largest block and divided by the number of points: near 0 when neighbours sit near
    each other in memory, a sizeable fraction of 1 when the file's order is unrelated
    to space."""
    if not mesh.blocks or mesh.n_points == 0:
        return 0.0, 0.0
    b = max(mesh.blocks, key=len)
    m = len(b)
    if m < 2:
        return 0.0, 0.0
    rows = np.linspace(0, m - 2, min(LOCALITY_SAMPLE, m - 1)).astype(np.int64)
    rows = rows[np.r_[True, rows[1:] != rows[:-1]]]  # (ascending: np.unique's, whose
    # first call in a process takes 7 ms, on the audit's serial path)
    c = b.cells[:, :b.info.n_corners]
    here, after = c[rows].astype(np.int64), c[rows + 1].astype(np.int64)
    span = np.median(here.max(axis=1) - here.min(axis=1))
    step = np.median(np.abs(after.min(axis=1) - here.min(axis=1)))
    return float(span / mesh.n_points), float(step / mesh.n_points)


def renumbered_for_audit(mesh: Mesh) -> tuple[Mesh, float | None]:
    """(:func:`renumbered` ``(mesh)``, seconds it took) when the mesh has
    :data:`RENUMBER_CELLS` cells or more, is not renumbered yet and its :func:`locality`
    is poor (either figure at least :data:`POOR_LOCALITY`), else (mesh, None). Call it
    as ``mesh, t = renumbered_for_audit(mesh)``: the two meshes are not meant to be held
    together. Without the kernels' built module, only from :data:`RENUMBER_CELLS_JIT`
    cells. From :data:`SPILL_CELLS` cells the file's numbers are :class:`SpilledIds`
    (kept in memory where no temporary file can be written, or where the system has no
    ``preadv``)."""
    if mesh.n_cells < RENUMBER_CELLS or mesh.file_cell_ids is not None:
        return mesh, None
    if mesh.n_cells < RENUMBER_CELLS_JIT and kernels.use_compiled(mesh.n_cells):
        from .kernels import ahead

        if not ahead.available():
            return mesh, None
    t0 = time.perf_counter()
    if max(locality(mesh)) < POOR_LOCALITY:
        return mesh, None
    out = renumbered(mesh)
    if out.n_cells >= SPILL_CELLS and hasattr(os, "preadv"):  # (not on Windows)
        try:
            out = dataclasses.replace(out, file_point_ids=SpilledIds(out.file_point_ids),
                                      file_cell_ids=SpilledIds(out.file_cell_ids))
        except OSError:  # no temporary folder to write to: the arrays stay in memory
            pass
    return out, time.perf_counter() - t0


class SpilledIds:
    """A read-only (n,) integer array kept in an unlinked temporary file, read back a
    part at a time: the file's numbers of a renumbered mesh (:data:`SPILL_CELLS`), which
    only the reports read. Supports ``len``, indexing by an int, a slice or an integer
    array (a new ndarray), ``astype`` and ``np.asarray``. Reads use ``os.pread`` (no
    shared file position): threads may read at once."""

    #: values read at a time when gathering by an index array (4 MiB of int32)
    CHUNK = 1 << 20
    #: index arrays up to this long are read one value at a time
    FEW = 64

    def __init__(self, values: np.ndarray):
        values = np.ascontiguousarray(values)
        if values.ndim != 1 or values.dtype.kind not in "iu":
            raise ValueError("SpilledIds holds a 1D integer array")
        self._file = tempfile.TemporaryFile(prefix="meshcheck-ids-")  # unlinked already
        self.dtype, self.shape = values.dtype, values.shape
        # written on a thread while the audit goes on (10-50 ms for 4.77M cells, the
        # write releasing the GIL); the values are held until then, and for good if the
        # write fails (a full disk); reads wait for the writer
        self._held: np.ndarray | None = values
        self._writer: threading.Thread | None = threading.Thread(
            target=self._write, name="meshcheck-spill", daemon=True)
        self._writer.start()

    def _write(self) -> None:
        try:
            self._held.tofile(self._file)
            self._file.flush()
        except (OSError, ValueError):
            return  # kept in memory
        self._held = None

    def __len__(self) -> int:
        return self.shape[0]

    @property
    def ndim(self) -> int:
        return 1

    def _read(self, lo: int, hi: int) -> np.ndarray:
        """values[lo:hi], 0 <= lo <= hi <= n."""
        writer = self._writer
        if writer is not None:
            writer.join()
            self._writer = None
        if self._held is not None:
            return self._held[lo:hi].copy()
        size = self.dtype.itemsize
        out = np.empty(hi - lo, self.dtype)
        view, done = memoryview(out.view(np.uint8)), 0
        while done < len(view):  # pread may return fewer bytes than asked
            got = os.preadv(self._file.fileno(), [view[done:]], lo * size + done)
            if got <= 0:
                raise OSError(f"temporary file of {self.shape[0]} ids ended early")
            done += got
        return out

    def __getitem__(self, key) -> np.ndarray:
        n = self.shape[0]
        if isinstance(key, slice):
            lo, hi, step = key.indices(n)
            return self._read(lo, max(lo, hi))[::step] if step > 0 else \
                np.asarray(self)[key]
        idx = np.asarray(key)
        if idx.dtype == bool:
            return np.asarray(self)[idx]
        if idx.ndim == 0:
            i = int(idx)
            if not -n <= i < n:
                raise IndexError(f"index {i} is out of bounds for {n} ids")
            return self._read(i % n, i % n + 1)[0]
        idx = idx.astype(np.int64, copy=False)
        if len(idx) and (idx.min() < -n or idx.max() >= n):
            raise IndexError(f"index out of bounds for {n} ids")
        idx = np.where(idx < 0, idx + n, idx)
        out = np.empty(idx.shape, self.dtype)
        if idx.size <= self.FEW:  # a few ids (the JSON's): one read each
            for k, i in enumerate(idx.flat):
                out.flat[k] = self._read(int(i), int(i) + 1)[0]
            return out
        lo_all, hi_all = int(idx.min()), int(idx.max()) + 1
        for lo in range(lo_all, hi_all, self.CHUNK):  # a part at a time, the asked-for ones
            hi = min(lo + self.CHUNK, hi_all)
            sel = (idx >= lo) & (idx < hi)
            if sel.any():
                out[sel] = self._read(lo, hi)[idx[sel] - lo]
        return out

    def __array__(self, dtype=None, copy=None) -> np.ndarray:
        out = self._read(0, self.shape[0])
        return out if dtype is None else out.astype(dtype, copy=False)

    def astype(self, dtype, copy: bool = True) -> np.ndarray:
        return np.asarray(self).astype(dtype, copy=False)

    def __reduce__(self):  # pickled as the plain array
        return np.asarray, (np.asarray(self),)

    def __repr__(self) -> str:
        return f"SpilledIds(n={self.shape[0]}, dtype={self.dtype})"
