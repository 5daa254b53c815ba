"""meshcheck's own MSH 4.1 reader (:mod:`meshcheck.formats.gmsh`) against meshio's.

Reference: meshio 5.3.5 reading the same file through :mod:`meshcheck.formats.via_meshio`
(the path every .msh file took before), on files written by gmsh itself (binary and
ASCII MSH 4.1; with physical groups, without, and with some entities left out of them;
linear, quadratic incomplete and complete cells; mixed meshes; node tags renumbered
sparse, huge and shuffled).  Points, cells per block, region tags, region names and
ignored counts must be identical, and so must the Mesh made of them.  Files meshio
cannot read (parametric nodes, big-endian, 4-byte size_t, partitioned meshes) are
compared with the same mesh in a form it can.  Damaged files must give one MeshReadError; inputs stay unchanged.
"""
import hashlib
import struct

import numpy as np
import pytest

from meshcheck.errors import MeshReadError
from meshcheck.formats.gmsh import GMSH_TO_VTK, GMSH_TYPES, read_msh41
from meshcheck.formats.via_meshio import read_via_meshio
from meshcheck.reading import mesh_from_raw, read_mesh, read_raw

gmsh = pytest.importorskip("gmsh")

# ---------------------------------------------------------------- gmsh-written files
def _box_tet(occ):
    occ.addBox(0, 0, 0, 1, 0.8, 0.6)
    occ.synchronize()
    gmsh.option.setNumber("Mesh.MeshSizeMax", 0.35)


def _transfinite(vols, n=3):
    ents = gmsh.model.getBoundary([(3, v) for v in vols], combined=False, oriented=False)
    for c in gmsh.model.getBoundary(ents, combined=False, oriented=False):
        gmsh.model.mesh.setTransfiniteCurve(abs(c[1]), n)
    for _, s in ents:
        gmsh.model.mesh.setTransfiniteSurface(abs(s))
        gmsh.model.mesh.setRecombine(2, abs(s))


def _box_hex(occ):
    occ.addBox(0, 0, 0, 1, 1, 1)
    occ.synchronize()
    _transfinite([1])
    gmsh.model.mesh.setTransfiniteVolume(1)


def _box_pyr(occ):                  # quads on the skin, tetrahedra inside: pyramids between
    occ.addBox(0, 0, 0, 1, 1, 1)
    occ.synchronize()
    _transfinite([1])


def _wedges(occ):
    occ.addRectangle(0, 0, 0, 1, 1)
    occ.synchronize()
    gmsh.option.setNumber("Mesh.MeshSizeMax", 0.5)
    occ.extrude([(2, 1)], 0, 0, 1, numElements=[2], recombine=True)
    occ.synchronize()


def _mixed(occ):                    # hexahedra | pyramids + tetrahedra, two volumes
    occ.addBox(0, 0, 0, 1, 1, 1)
    occ.addBox(1, 0, 0, 1, 1, 1)
    occ.fragment([(3, 1)], [(3, 2)])
    occ.synchronize()
    _transfinite([1])
    gmsh.model.mesh.setTransfiniteVolume(1)
    gmsh.option.setNumber("Mesh.MeshSizeMax", 0.4)


MODELS = {"tet": _box_tet, "hex": _box_hex, "pyr": _box_pyr, "wedge": _wedges, "mixed": _mixed}


def _physical(mode):
    vols = [t for _, t in gmsh.model.getEntities(3)]
    if mode == "named":         # one group per volume + a named surface group (other dim)
        for k, v in enumerate(vols):
            gmsh.model.addPhysicalGroup(3, [v], 5 + 4 * k, name=["air", "water"][k])
        gmsh.model.addPhysicalGroup(2, [gmsh.model.getEntities(2)[0][1]], 1, name="wall")
    elif mode == "partial":     # entities without a group are saved too (SaveAll)
        gmsh.model.addPhysicalGroup(3, vols[:1] if len(vols) > 1 else [], 7, name="fluid")
        gmsh.model.addPhysicalGroup(2, [gmsh.model.getEntities(2)[0][1]], 3, name="inlet")
        gmsh.option.setNumber("Mesh.SaveAll", 1)


def _renumber(how):
    tags, _, _ = gmsh.model.mesh.getNodes()
    tags = tags.astype(np.int64)
    if how == "sparse":
        new = tags * 7 + 100
    elif how == "huge":             # beyond a lookup table: binary search path
        new = tags * 10_000_019 + 5
    else:                           # shuffled: tags in no order
        new = np.random.default_rng(3).permutation(len(tags)) * 3 + 11
    gmsh.model.mesh.renumberNodes(tags, new)


def write_gmsh(path, model, *, binary=True, order=1, complete=False, phys="named",
               renumber=None, parametric=False):
    """Mesh MODELS[model] with gmsh and write it as MSH 4.1 to ``path``."""
    gmsh.initialize(interruptible=False)
    try:
        for k, v in {"General.Terminal": 0, "General.NumThreads": 1, "Mesh.RandomSeed": 1,
                     "Mesh.SecondOrderIncomplete": 0 if complete else 1}.items():
            gmsh.option.setNumber(k, v)
        gmsh.model.add(model)
        MODELS[model](gmsh.model.occ)
        _physical(phys)
        gmsh.model.mesh.generate(3)
        if order == 2:
            gmsh.model.mesh.setOrder(2)
        if renumber:
            _renumber(renumber)
        gmsh.option.setNumber("Mesh.MshFileVersion", 4.1)
        gmsh.option.setNumber("Mesh.Binary", int(binary))
        gmsh.option.setNumber("Mesh.SaveParametric", int(parametric))
        gmsh.write(str(path))
    finally:
        gmsh.finalize()
    return path


def _sha(p):
    return hashlib.sha256(p.read_bytes()).hexdigest()


def _ours(path):
    before = _sha(path)
    raw = read_msh41(path)
    assert raw is not None and _sha(path) == before
    return raw


def _meshio(path):
    return read_via_meshio(path, "gmsh", f"MSH 4.1 {'binary' if _binary(path) else 'ASCII'}")


def _binary(path):
    return path.read_bytes().split(b"\n", 2)[1].split()[1] == b"1"


def assert_same_raw(a, b):
    assert a.points.dtype == b.points.dtype == np.float64
    assert np.array_equal(a.points, b.points)
    assert [x.type for x in a.blocks] == [x.type for x in b.blocks]
    for x, y in zip(a.blocks, b.blocks):
        # ours in int32 (every row number fits: the mesh's index type), meshio's int64
        assert x.cells.dtype == np.int32 and y.cells.dtype in (np.int32, np.int64)
        assert np.array_equal(x.cells, y.cells), x.type
        assert np.array_equal(x.region, y.region), x.type
    assert a.region_names == b.region_names
    assert a.ignored == b.ignored
    assert a.format == b.format


def assert_same_mesh(a, b):
    ma, mb = mesh_from_raw(a, "m.msh", units="m"), mesh_from_raw(b, "m.msh", units="m")
    assert np.array_equal(ma.points, mb.points)
    assert [(x.type, x.cells.tolist(), x.region.tolist()) for x in ma.blocks] == \
        [(x.type, x.cells.tolist(), x.region.tolist()) for x in mb.blocks]
    assert ma.region_names == mb.region_names and ma.dim == mb.dim


def _fails_alike(a, b):
    """Both RawMeshes refused by mesh_from_raw with the same message."""
    msgs = []
    for raw in (a, b):
        with pytest.raises(MeshReadError) as exc:
            mesh_from_raw(raw, "m.msh", units="m")
        msgs.append(str(exc.value))
    assert msgs[0] == msgs[1]
    return msgs[0]


CASES = [(m, b, o, c, p) for m in MODELS for b in (True, False)
         for o, c in ((1, False), (2, False), (2, True)) for p in ("named", "none", "partial")
         if o == 1 or p == "named"]
#: meshio 5.3.5 refuses these (and so does our reader, with the meshio path's message)
REFUSED = {("wedge", 2, False): "wedge15", ("pyr", 2, False): "pyramid13",
           ("mixed", 2, False): "pyramid13"}
#: read alike by both, then refused as unsupported cell types
UNSUPPORTED = {("wedge", 2, True): "wedge18", ("pyr", 2, True): "pyramid14",
               ("mixed", 2, True): "pyramid14"}


@pytest.mark.parametrize("model, binary, order, complete, phys", CASES,
                         ids=[f"{m}-{'bin' if b else 'ascii'}-o{o}{'c' if c else ''}-{p}"
                              for m, b, o, c, p in CASES])
def test_same_as_meshio(tmp_path, model, binary, order, complete, phys):
    path = write_gmsh(tmp_path / "m.msh", model, binary=binary, order=order,
                      complete=complete, phys=phys)
    key = (model, order, complete)
    if key in REFUSED:
        with pytest.raises(MeshReadError, match=f"element type {REFUSED[key]} cannot be read "
                                                r"from this format .* \(quadratic wedges as"):
            read_raw(path)
        with pytest.raises(MeshReadError, match=f"element type {REFUSED[key]} cannot be read"):
            _meshio(path)
        return
    ours, ref = _ours(path), _meshio(path)
    assert_same_raw(ours, ref)
    assert read_raw(path).point_ids is not None        # read_raw dispatches to our reader
    if key in UNSUPPORTED:
        assert UNSUPPORTED[key] in _fails_alike(ours, ref)
        return
    assert_same_mesh(ours, ref)
    vol = [b for b in ours.blocks if b.type not in ("triangle", "triangle6", "quad", "quad8",
                                                     "quad9")]
    assert vol and all(len(b.cells) for b in vol)
    regions = set(np.concatenate([b.region for b in vol]).tolist())
    if phys == "none":
        assert regions == {0} and ours.region_names == {}
    elif phys == "named":
        assert regions == ({5, 9} if model == "mixed" else {5})
        assert ours.region_names == ({5: "air", 9: "water"} if model == "mixed" else {5: "air"})
    else:
        assert regions == ({7, 0} if model == "mixed" else {0})


@pytest.mark.parametrize("binary", [True, False], ids=["bin", "ascii"])
def test_wedge15_order_ready_when_no_longer_refused(tmp_path, monkeypatch, binary):
    """wedge15 is refused like the meshio path does (pinned by test_formats_roundtrip);
    with the refusal lifted, gmsh's wedge15 comes out in meshcheck's node order: every
    mid-edge node at the middle of its edge (cells.CELL_TYPES), on a mesh whose mid-nodes
    gmsh put on straight edges."""
    import meshcheck.formats.gmsh as reader
    from meshcheck.cells import CELL_TYPES
    path = write_gmsh(tmp_path / "m.msh", "wedge", binary=binary, order=2)
    monkeypatch.setattr(reader, "_REFUSED", {"pyramid13"})
    m = mesh_from_raw(_ours(path), "m.msh", units="m")
    assert [b.type for b in m.blocks] == ["wedge15"]
    e = CELL_TYPES["wedge15"].edges
    p = m.points[m.blocks[0].cells]
    assert np.abs(p[:, e[:, 2]] - 0.5 * (p[:, e[:, 0]] + p[:, e[:, 1]])).max() < 1e-12
    assert not np.allclose(p[:, e[:, 2]], p[:, e[[1, 2, 0, 4, 5, 3, 7, 8, 6], 2]])


@pytest.mark.parametrize("how", ["sparse", "huge", "shuffled"])
@pytest.mark.parametrize("binary", [True, False], ids=["bin", "ascii"])
@pytest.mark.parametrize("model, order", [("mixed", 1), ("tet", 2), ("hex", 2)])
def test_renumbered_nodes(tmp_path, how, binary, model, order):
    path = write_gmsh(tmp_path / "m.msh", model, binary=binary, order=order, renumber=how,
                      phys="none")
    ours = _ours(path)
    plain = _ours(write_gmsh(tmp_path / "p.msh", model, binary=binary, order=order, phys="none"))
    assert not np.array_equal(ours.point_ids, plain.point_ids)
    # meshio allocates a table as long as the largest tag (8e10 bytes for "huge"): the file
    # with gmsh's own tags is the reference there (gmsh keeps the nodes in their order)
    ref = plain if how == "huge" else _meshio(path)
    assert_same_raw(ours, ref)
    assert_same_mesh(ours, ref)


@pytest.mark.parametrize("binary", [True, False], ids=["bin", "ascii"])
def test_parametric_nodes(tmp_path, binary):
    """meshio refuses parametric nodes; ours reads them as the same mesh saved without."""
    par = write_gmsh(tmp_path / "par.msh", "mixed", binary=binary, parametric=True)
    plain = write_gmsh(tmp_path / "plain.msh", "mixed", binary=binary)
    assert par.read_bytes() != plain.read_bytes()
    with pytest.raises(MeshReadError, match="parametric"):
        _meshio(par)
    assert_same_raw(_ours(par), _meshio(plain))


def test_sections_skipped_and_crlf(tmp_path):
    """Unknown sections are skipped; ASCII files with CRLF line ends or a byte-order mark
    read alike."""
    path = write_gmsh(tmp_path / "m.msh", "mixed", binary=False)
    ref = _ours(path)
    text = path.read_bytes().replace(b"$Entities\n", b"$Comments\nhello $Nodes\n$EndComments\n"
                                     b"$Entities\n", 1)
    (tmp_path / "c.msh").write_bytes(text)
    assert_same_raw(_ours(tmp_path / "c.msh"), ref)
    (tmp_path / "crlf.msh").write_bytes(text.replace(b"\n", b"\r\n"))
    assert_same_raw(_ours(tmp_path / "crlf.msh"), ref)
    (tmp_path / "bom.msh").write_bytes(b"\xef\xbb\xbf\n" + text)
    assert_same_raw(read_raw(tmp_path / "bom.msh"), ref)


@pytest.mark.parametrize("model, order", [("mixed", 1), ("tet", 2), ("hex", 2)])
def test_binary_and_ascii_alike(tmp_path, model, order):
    b = _ours(write_gmsh(tmp_path / "b.msh", model, order=order))
    a = _ours(write_gmsh(tmp_path / "a.msh", model, order=order, binary=False))
    assert np.allclose(a.points, b.points, rtol=1e-15, atol=0)   # %.16g text vs binary
    assert [(x.type, x.cells.tolist(), x.region.tolist()) for x in a.blocks] == \
        [(x.type, x.cells.tolist(), x.region.tolist()) for x in b.blocks]


# ------------------------------------------------- byte order and 4-byte size_t (own writer)
def _msh41(points, tets, endian="<", dsize=8, binary=True) -> bytes:
    """A minimal MSH 4.1 file written from the format description: one volume (tag 2,
    physical 4 "gas"), nodes tagged 10, 20, 30..., one block of tetrahedra."""
    n = len(points)
    tags = 10 * np.arange(1, n + 1)
    out = [b"$MeshFormat\n", f"4.1 {int(binary)} {dsize}\n".encode()]
    st = "Q" if dsize == 8 else "I"

    def pack(fmt, *v):
        return struct.pack(endian + fmt.replace("N", st), *v)
    if binary:
        out += [pack("i", 1), b"\n"]
    out += [b"$EndMeshFormat\n$PhysicalNames\n1\n3 4 \"gas\"\n$EndPhysicalNames\n$Entities\n"]
    if binary:
        out += [pack("NNNN", 0, 0, 0, 1), pack("i6dNiN", 2, 0, 0, 0, 1, 1, 1, 1, 4, 0),
                b"\n$EndEntities\n$Nodes\n", pack("NNNN", 1, n, 10, 10 * n),
                pack("iiiN", 3, 2, 0, n), tags.astype(endian + f"u{dsize}").tobytes(),
                points.astype(endian + "f8").tobytes(), b"\n$EndNodes\n$Elements\n",
                pack("NNNN", 1, len(tets), 1, len(tets)), pack("iiiN", 3, 2, 4, len(tets)),
                np.column_stack([np.arange(1, len(tets) + 1), tags[tets]]).astype(
                    endian + f"u{dsize}").tobytes(), b"\n$EndElements\n"]
    else:
        out += [b"0 0 0 1\n2 0 0 0 1 1 1 1 4 0\n$EndEntities\n$Nodes\n",
                f"1 {n} 10 {10 * n}\n3 2 0 {n}\n".encode()]
        out += [f"{t}\n".encode() for t in tags] + [f"{x!r} {y!r} {z!r}\n".encode()
                                                     for x, y, z in points.tolist()]
        out += [f"$EndNodes\n$Elements\n1 {len(tets)} 1 {len(tets)}\n3 2 4 {len(tets)}\n".encode()]
        out += [(" ".join(str(v) for v in [k + 1, *tags[c]]) + "\n").encode()
                for k, c in enumerate(tets)]
        out += [b"$EndElements\n"]
    return b"".join(out)


def _small():
    rng = np.random.default_rng(7)
    pts = rng.random((30, 3))
    tets = np.array([rng.choice(30, 4, replace=False) for _ in range(40)])
    return pts, tets


@pytest.mark.parametrize("endian, dsize, binary", [("<", 8, True), (">", 8, True),
                                                   ("<", 4, True), (">", 4, True),
                                                   ("<", 8, False)])
def test_byte_order_and_size_t(tmp_path, endian, dsize, binary):
    pts, tets = _small()
    path = tmp_path / "m.msh"
    path.write_bytes(_msh41(pts, tets, endian, dsize, binary))
    raw = _ours(path)
    assert np.array_equal(raw.points, pts)
    assert [b.type for b in raw.blocks] == ["tetra"]
    assert np.array_equal(raw.blocks[0].cells, tets)
    assert raw.blocks[0].region.tolist() == [4] * len(tets) and raw.region_names == {4: "gas"}
    assert raw.point_ids.tolist() == list(range(10, 301, 10))
    if endian == "<":               # meshio reads the file's native byte order only
        assert_same_raw(raw, _meshio(path))


@pytest.mark.parametrize("binary", [True, False], ids=["bin", "ascii"])
def test_non_finite_coordinate_names_the_node_tag(tmp_path, binary):
    pts, tets = _small()
    pts[2, 1] = np.nan
    path = tmp_path / "m.msh"
    path.write_bytes(_msh41(pts, tets, binary=binary))
    with pytest.raises(MeshReadError, match=r"m\.msh: node 30 has a non-finite coordinate "
                                            r"\([\d.]+, nan, [\d.]+\) and 1 node"):
        read_mesh(path, units="m")


def test_tables_match_meshio():
    from meshio._common import num_nodes_per_cell
    from meshio.gmsh.common import _gmsh_to_meshio_order, _gmsh_to_meshio_type
    assert {k: v[0] for k, v in GMSH_TYPES.items()} == _gmsh_to_meshio_type
    assert all(num_nodes_per_cell[name] == k for name, k in GMSH_TYPES.values())
    for name, k in GMSH_TYPES.values():
        idx = np.arange(2 * k).reshape(2, k)
        assert np.array_equal(idx[:, GMSH_TO_VTK.get(name, np.arange(k))],
                              _gmsh_to_meshio_order(name, idx)), name


def _by_tag(raw):
    """Coordinates sorted by node tag, and per type the cells as rows of (region, node
    tags...) sorted: what a mesh is, whatever the order of its nodes and cells."""
    order = np.argsort(raw.point_ids)
    cells = {}
    for b in raw.blocks:
        rows = np.column_stack([b.region, raw.point_ids[b.cells]])
        cells[b.type] = np.vstack([cells[b.type], rows]) if b.type in cells else rows
    return (raw.point_ids[order], raw.points[order],
            {t: c[np.lexsort(c.T[::-1])] for t, c in cells.items()})


def _partitioned(path, phys, binary, ghosts=False):
    gmsh.initialize(interruptible=False)
    try:
        gmsh.option.setNumber("General.Terminal", 0)
        gmsh.option.setNumber("Mesh.RandomSeed", 1)
        _mixed(gmsh.model.occ)
        _physical(phys)
        gmsh.model.mesh.generate(3)
        gmsh.option.setNumber("Mesh.Binary", int(binary))
        gmsh.write(str(path / "whole.msh"))
        gmsh.option.setNumber("Mesh.PartitionCreateGhostCells", int(ghosts))
        gmsh.model.mesh.partition(3)
        gmsh.write(str(path / "parts.msh"))
    finally:
        gmsh.finalize()
    return path / "whole.msh", path / "parts.msh"


@pytest.mark.parametrize("phys", ["named", "none", "partial"])
@pytest.mark.parametrize("binary", [True, False], ids=["bin", "ascii"])
def test_partitioned_mesh(tmp_path, phys, binary):
    """meshio 5.3.5 cannot read partitioned MSH 4.1 files; ours reads the same mesh as the
    file saved before partitioning (regions from the partition entities or their parents)."""
    whole, parts = _partitioned(tmp_path, phys, binary)
    assert b"$PartitionedEntities" in parts.read_bytes()
    a, b = _by_tag(_ours(parts)), _by_tag(_ours(whole))
    assert np.array_equal(a[0], b[0]) and np.array_equal(a[1], b[1])
    vol = {t for t in b[2] if t in ("tetra", "hexahedron", "pyramid")}
    assert vol == {"tetra", "hexahedron", "pyramid"}
    for t in vol:
        assert np.array_equal(a[2][t], b[2][t]), t
    assert _ours(parts).region_names == _ours(whole).region_names
    with pytest.raises(MeshReadError):
        _meshio(parts)


@pytest.mark.parametrize("binary", [True, False], ids=["bin", "ascii"])
def test_partitioned_damaged(tmp_path, binary):
    """Cut anywhere, or a flipped bit in the partitioned entities: a mesh or one
    MeshReadError from the reader, nothing else."""
    _, parts = _partitioned(tmp_path, "named", binary)
    data = parts.read_bytes()
    path = tmp_path / "bad.msh"
    a, b = data.index(b"$PartitionedEntities"), data.index(b"$EndPartitionedEntities")
    for end in range(a, b + 30, 41):
        path.write_bytes(data[:end])
        with pytest.raises(MeshReadError, match=r"^\S*bad\.msh: [^\n]+$"):
            read_msh41(path)
    rng = np.random.default_rng(5)
    for _ in range(200):
        bad = bytearray(data)
        bad[int(rng.integers(a + 22, b))] ^= 1 << int(rng.integers(8))
        path.write_bytes(bytes(bad))
        try:
            read_msh41(path)
        except MeshReadError as exc:
            assert "\n" not in str(exc)


def test_partitioned_with_ghost_cells_refused(tmp_path):
    _, parts = _partitioned(tmp_path, "named", True, ghosts=True)
    with pytest.raises(MeshReadError, match=r"parts\.msh: partitioned mesh with \d+ ghost "
                                            r"entities .*; save it without ghost cells"):
        read_raw(parts)


def test_other_versions_left_to_meshio(tmp_path):
    pts, tets = _small()
    path = tmp_path / "m.msh"
    path.write_bytes(b"$MeshFormaX\n4.1 0 8\n$EndMeshFormat\n")
    with pytest.raises(MeshReadError, match=r"m\.msh: the file does not start with \$MeshFormat"):
        read_msh41(path)
    path.write_bytes(_msh41(pts, tets).replace(b"4.1 1 8", b"4.0 1 8", 1))
    assert read_msh41(path) is None


# ------------------------------------------------------------------------- damaged files
@pytest.fixture(scope="module")
def files(tmp_path_factory):
    root = tmp_path_factory.mktemp("msh")
    return {b: write_gmsh(root / f"{b}.msh", "mixed", binary=b) for b in (True, False)}


@pytest.mark.parametrize("binary", [True, False], ids=["bin", "ascii"])
@pytest.mark.parametrize("frac", [0.1, 0.3, 0.5, 0.7, 0.9, 0.99])
def test_truncated(tmp_path, files, binary, frac):
    data = files[binary].read_bytes()
    path = tmp_path / "cut.msh"
    path.write_bytes(data[:int(len(data) * frac)])
    before = _sha(path)
    with pytest.raises(MeshReadError, match=r"cut\.msh: the \$\w+ section (has no \$End\w+; "
                                            r"the file is truncated|holds less data)"):
        read_raw(path)
    assert _sha(path) == before


@pytest.mark.parametrize("binary", [True, False], ids=["bin", "ascii"])
def test_every_cut_is_a_read_error(tmp_path, files, binary):
    """Cut anywhere (every 37th byte): one MeshReadError from the reader itself."""
    data = files[binary].read_bytes()
    path = tmp_path / "cut.msh"
    for end in range(data.index(b"$EndMeshFormat") + 15, len(data) - 1, 37):
        path.write_bytes(data[:end])
        with pytest.raises(MeshReadError, match=r"^\S*cut\.msh: [^\n]+$"):
            read_msh41(path)


def test_flipped_bytes_never_crash(tmp_path, files):
    """Random byte damage: a mesh or one MeshReadError from the reader, nothing else."""
    data = bytearray(files[True].read_bytes())
    rng = np.random.default_rng(11)
    path = tmp_path / "flip.msh"
    errors = 0
    for _ in range(300):
        bad = bytearray(data)
        k = int(rng.integers(data.index(b"$EndMeshFormat") + 15, len(data)))
        bad[k] ^= 1 << int(rng.integers(8))
        path.write_bytes(bytes(bad))
        try:
            read_msh41(path)
        except MeshReadError as exc:
            assert "\n" not in str(exc) and "flip.msh" in str(exc)
            errors += 1
    assert errors > 0


def _edit(files, binary, old, new):
    data = files[binary].read_bytes()
    assert old in data
    return data.replace(old, new, 1)


def _line(data: bytes, section: bytes, i: int) -> tuple[int, int]:
    """Byte range of line i (0: the count line) after the $section line of an ASCII file."""
    k = data.index(b"$" + section + b"\n") + len(section) + 2
    for _ in range(i):
        k = data.index(b"\n", k) + 1
    return k, data.index(b"\n", k)


def _replace_line(files, section, i, edit):
    data = files[False].read_bytes()
    a, b = _line(data, section, i)
    return data[:a] + edit(data[a:b].split()) + data[b:]


def _binary_node_count(files):
    data = files[True].read_bytes()
    k = data.index(b"$Nodes\n") + 7
    return data[:k + 8] + struct.pack("<Q", 10**12) + data[k + 16:]


@pytest.mark.parametrize("name, make, match", [
    ("bad-file-type", lambda f: _edit(f, False, b"4.1 0 8", b"4.1 2 8"),
     r"\$MeshFormat header '4\.1 2 8' is damaged"),
    ("bad-byte-order-int", lambda f: _edit(f, True, b"4.1 1 8\n\x01\x00\x00\x00",
                                           b"4.1 1 8\n\x07\x00\x00\x00"),
     r"without the byte-order integer 1"),
    ("node-count-too-big", lambda f: _replace_line(
        f, b"Nodes", 0, lambda w: b" ".join([w[0], b"99999999", *w[2:]])),
     r"the \$Nodes section .*99,999,999 nodes"),
    ("binary-node-count-too-big", _binary_node_count, r"1,000,000,000,000 nodes"),
    ("element-line-extra-number", lambda f: _replace_line(
        f, b"Elements", 3, lambda w: b" ".join(w + [b"5"])),
     r"line 2 of the elements of element block 1 of \d+ holds \d+ numbers where \d+ are "),
    ("element-line-missing-number", lambda f: _replace_line(
        f, b"Elements", 3, lambda w: b" ".join(w[:-1])),
     r"line 2 of the elements of element block 1 of \d+ holds \d+ numbers where \d+ are "),
    ("node-line-extra-number", lambda f: _replace_line(
        f, b"Nodes", 3, lambda w: b" ".join(w + [b"5"])),
     r"line 1 of the coordinates of node block 1 of \d+ holds \d+ numbers where \d+ are "),
    ("text-in-elements", lambda f: _replace_line(
        f, b"Elements", 3, lambda w: b" ".join(w[:-1] + [b"x"])),
     r"hold text that is not a number"),
    ("more-than-declared", lambda f: _edit(f, False, b"$EndElements", b"1 2 3\n$EndElements"),
     r"the \$Elements section holds more than its counts declare"),
    ("unknown-element-type", lambda f: _replace_line(
        f, b"Elements", 1, lambda w: b" ".join(w[:2] + [b"999"] + w[3:])),
     r"element type 999, which is not a gmsh element type"),
    ("node-not-defined", lambda f: _replace_line(
        f, b"Elements", 3, lambda w: b" ".join(w[:-1] + [b"99999"])),
     r"refers to node 99999, which is not in the \$Nodes section"),
    ("elements-before-nodes", lambda f: _edit(f, False, b"$Nodes", b"$Nodez").replace(
        b"$EndNodes", b"$EndNodez", 1), r"the \$Elements section comes before the \$Nodes"),
])
def test_damaged(tmp_path, files, name, make, match):
    path = tmp_path / "bad.msh"
    path.write_bytes(make(files))
    before = _sha(path)
    with pytest.raises(MeshReadError, match=r"^\S*bad\.msh: [^\n]*" + match + r"[^\n]*; [^\n]+$"):
        read_raw(path)
    assert _sha(path) == before


_ONE_TET = """$MeshFormat
4.1 0 8
$EndMeshFormat
$Nodes
1 4 1 4
3 1 0 4
1
2
3
4
0 0 0
1 0 0
0 1 0
0 0 1
$EndNodes
$Elements
1 1 1 1
3 1 4 1
1 1 2 3 {last}
$EndElements
"""


@pytest.mark.parametrize("last", [2**32 + 1, 2**32 + 4, 2**31 + 3])
def test_node_tags_past_int32_never_wrap_into_a_node(tmp_path, last):
    # the rows are kept in int32; a tag of 2**32 + 1 must not become row 0
    path = tmp_path / "t.msh"
    path.write_text(_ONE_TET.format(last=4))
    raw = read_msh41(path)
    assert raw.blocks[0].cells.dtype == np.int32 and raw.blocks[0].cells.tolist() == [[0, 1, 2, 3]]
    path.write_text(_ONE_TET.format(last=last))
    with pytest.raises(MeshReadError, match=f"refers to node {last}, which is not in"):
        read_msh41(path)


def _binary_tets(path, points, tets, bad=()):
    """A binary MSH 4.1 file of one node block and one tetrahedron block (node tags 1..n,
    element tags 1..m); ``bad``: element rows whose last node tag is replaced by 99999."""
    n, m = len(points), len(tets)
    rows = np.column_stack([np.arange(1, m + 1), tets + 1]).astype("<u8")
    for r in bad:
        rows[r, -1] = 99999
    with open(path, "wb") as fh:
        fh.write(b"$MeshFormat\n4.1 1 8\n" + struct.pack("<i", 1) + b"\n$EndMeshFormat\n")
        fh.write(b"$Nodes\n" + struct.pack("<QQQQ", 1, n, 1, n) + struct.pack("<iiiQ", 3, 1, 0, n))
        fh.write(np.arange(1, n + 1, dtype="<u8").tobytes() + points.astype("<f8").tobytes())
        fh.write(b"\n$EndNodes\n$Elements\n" + struct.pack("<QQQQ", 1, m, 1, m)
                 + struct.pack("<iiiQ", 3, 1, 4, m) + rows.tobytes() + b"\n$EndElements\n")


@pytest.mark.parametrize("bad", [(), (1700,), (200, 1700), (1999,)])
def test_large_binary_blocks_read_on_two_threads_as_in_one_pass(tmp_path, monkeypatch, bad):
    # from _PARALLEL_ELEMENTS elements (lowered here) a binary block is read in two halves
    # by positional reads on two threads: the same cells, and the same error (the first
    # bad element in the file) as the chunk loop
    import meshcheck.formats.gmsh as G
    from meshes import tet_box

    box = tet_box((7, 7, 7))  # 2058 tetrahedra
    path = tmp_path / "t.msh"
    _binary_tets(path, box.points, box.blocks[0].cells, bad)
    monkeypatch.setattr(G, "_ELEMENT_CHUNK", 8 * 5 * 97)  # chunks of 97 rows
    got = {}
    calls = []
    real = G._parallel_block
    monkeypatch.setattr(G, "_parallel_block", lambda *a: (calls.append(1), real(*a))[1])
    for name, threshold in (("serial", 10**12), ("threads", 1)):
        monkeypatch.setattr(G, "_PARALLEL_ELEMENTS", threshold)
        calls.clear()
        try:
            raw = read_raw(path)
            got[name] = raw.blocks[0].cells
            assert raw.blocks[0].cells.shape == (len(box.blocks[0].cells), 4)
        except MeshReadError as exc:
            got[name] = str(exc)
        assert len(calls) == (name == "threads")
    if bad:
        assert got["serial"] == got["threads"]
        assert f"element {min(bad) + 1} (in element block 1 of 1) refers to node 99999" \
            in got["threads"]
    else:
        np.testing.assert_array_equal(got["threads"], got["serial"])
        np.testing.assert_array_equal(got["threads"], box.blocks[0].cells)
