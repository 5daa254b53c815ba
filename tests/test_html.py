"""The HTML audit report: self-contained, escaped, printable, rendered in headless Chromium.

The browser tests drive Debian's chromium through chromedriver with the W3C
WebDriver protocol over plain HTTP (urllib; no client library).  The page is
opened from a file: URL with nothing served, so any request to the network
would show in Chromium's network log (performance log).  Screenshots go to
``tests/artifacts/`` (ignored by git through a ``.gitignore`` written there) or
to ``$MESHCHECK_ARTIFACTS``.
"""
from __future__ import annotations

import base64
import json
import os
import re
import shutil
import socket
import subprocess
import time
import urllib.error
import urllib.request
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("matplotlib")

from meshcheck import figures, html_report  # noqa: E402
from meshcheck.acoustics import band_centres  # noqa: E402
from meshcheck.advice import AdviceSettings  # noqa: E402
from meshcheck.cli import main  # noqa: E402
from meshcheck.cost import cost_markdown  # noqa: E402
from meshcheck.job import load_job, parse_job  # noqa: E402
from meshcheck.mesh import CellBlock, Mesh  # noqa: E402
from meshcheck.pipeline import AuditSettings, audit, audit_file  # noqa: E402
from meshcheck.report import to_dict  # noqa: E402
from meshes import grid_hexes, tet10_box, tet_box  # noqa: E402
from test_figures import GRADED_FMAX, graded_tets  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent
CHROMIUM = shutil.which("chromium") or "/usr/bin/chromium"
CHROMEDRIVER = shutil.which("chromedriver") or "/usr/bin/chromedriver"
HAVE_BROWSER = os.access(CHROMIUM, os.X_OK) and os.access(CHROMEDRIVER, os.X_OK)
needs_browser = pytest.mark.skipif(
    not HAVE_BROWSER, reason="headless browser tests need Debian's chromium and chromium-driver "
    "(apt-get install chromium chromium-driver; .ci/run installs them)")
XSS = "<script>alert(1)</script>"
SECTIONS = ["verdict", "limits", "advice", "quality", "method"]


# ------------------------------------------------------------------ reports
def _write(res, folder: Path, name: str) -> tuple[Path, dict, object]:
    d = to_dict(res)
    return html_report.write_html(res, folder / f"{name}.html", d), d, res


@pytest.fixture(scope="module")
def reports(tmp_path_factory):
    """name -> (html path, report dict, AuditResult): a ready (the demo), a limited (in mm),
    a blocked and a fixed-order audit whose names try to inject a script ("xss" = "fixed")."""
    folder = tmp_path_factory.mktemp("html")
    out = {}
    demo = audit_file(ROOT / "sample_meshes" / "enclosure.msh",
                      AuditSettings(frequencies=tuple(band_centres(50.0, 2000.0, 3))), units="m")
    out["ready"] = _write(demo, folder, "ready")
    limited = audit(graded_tets(unit="mm"),
                    AuditSettings(frequencies=tuple(np.linspace(50, GRADED_FMAX, 30))))
    out["limited"] = _write(limited, folder, "limited")
    out["blocked"] = _write(audit(_inverted(), AuditSettings(frequencies=(100.0, 200.0))),
                            folder, "blocked")
    # names that try to inject markup, on a fixed-order (p = 2) audit
    out["xss"] = out["fixed"] = _write(audit(_xss_mesh(), AuditSettings(
        frequencies=(200.0, 400.0), advice=AdviceSettings(order=2))), folder, "xss")
    # a job file (flow, lossy water, a PML) on hexahedra in mm, and the same with hostile names
    job = load_job(_job_file(folder))
    for name, names in (("job", JOB_NAMES), ("job_xss", XSS_NAMES)):
        out[name] = _write(audit(_job_mesh(names), AuditSettings(JOB_FREQS, job=job)),
                           folder, name)
    out["quadratic"] = _write(audit(_bent_tet10(), AuditSettings((100.0, 200.0))), folder,
                              "quadratic")
    return out


JOB_NAMES = {1: "duct_air", 2: "tank_water", 3: "pml"}
XSS_NAMES = {1: XSS, 2: "\" onmouseover=\"alert(2)", 3: "<img src=x onerror=alert(4)>"}
JOB_FREQS = (100.0, 400.0)
JOB_FLOW = 34.0        # m/s along x in region 1
LAYER_T = 0.3          # m, the PML beyond x = 1 m


def _job_file(folder: Path) -> Path:
    """Regions by tag (names may be hostile): flow in 1, lossy water in 2, a PML (3) around 2."""
    path = folder / "job.toml"
    path.write_text(f"[region.1]\nflow = [{JOB_FLOW}, 0.0, 0.0]\n"
                    "[region.2]\nmedium = \"water\"\nloss_factor = 0.05\n"
                    "[region.3]\nrole = \"pml\"\nsurrounds = \"2\"\n")
    return path


def _job_mesh(names: dict) -> Mesh:
    """Hexahedra, x in [0, 1] m (region 1 below 0.5, region 2 above) and a layer (3) of
    LAYER_T m and 3 cells across beyond x = 1; unit mm."""
    xs = np.concatenate([np.linspace(0.0, 1.0, 6), np.linspace(1.0, 1.0 + LAYER_T, 4)[1:]])
    ys = zs = np.linspace(0.0, 0.4, 3)
    x, y, z = np.meshgrid(xs, ys, zs, indexing="ij")
    pts = np.column_stack([x.ravel(), y.ravel(), z.ravel()])
    hexes = grid_hexes((len(xs) - 1, len(ys) - 1, len(zs) - 1))
    cx = pts[hexes].mean(axis=1)[:, 0]
    region = np.where(cx < 0.5, 1, np.where(cx < 1.0, 2, 3))
    return Mesh(pts, (CellBlock("hexahedron", hexes, region),), names, 3, "job.msh", "mm")


def _bent_tet10() -> Mesh:
    """Quadratic tets with one interior mid-node pushed off its edge (two cells fall below
    the default det J min/max threshold of 0.3)."""
    m = tet10_box((2, 2, 2))
    pts = m.points.copy()
    mids = np.unique(m.blocks[0].cells[:, 4:])
    i = mids[np.argmin(np.linalg.norm(pts[mids] - 0.5, axis=1))]
    pts[i] += 0.12 * np.array([1.0, 0.7, 0.4])
    return Mesh(pts, m.blocks, m.region_names, 3, "bent.msh", "m")


def _inverted() -> Mesh:
    m = tet_box((2, 2, 2))
    cells = m.blocks[0].cells.copy()
    cells[0, [0, 1]] = cells[0, [1, 0]]
    return Mesh(m.points, (CellBlock("tetra", cells, m.blocks[0].region),), {1: "air"}, 3,
                "inverted.msh", "m")


def _xss_mesh() -> Mesh:
    m = graded_tets(names={1: XSS, 2: "\" onmouseover=\"alert(2)"},
                    source="<img src=x onerror=alert(3)>.msh")
    return m


class _Doc(HTMLParser):
    """Tags, attributes, table rows (by table id) and text of a document."""

    def __init__(self, text: str):
        super().__init__(convert_charrefs=True)
        self.tags, self.attrs, self.text = [], [], []
        self.tables: dict[str, list[list[str]]] = {}
        self._table, self._row, self._cell = None, None, None
        self.feed(text)

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        self.attrs.extend((tag, k, v or "") for k, v in attrs)
        a = dict(attrs)
        if tag == "table":
            self._table = a.get("id", "")
            self.tables[self._table] = []
        elif tag == "tr" and self._table is not None:
            self._row = []
        elif tag in ("td", "th") and self._row is not None:
            self._cell = []

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._cell is not None:
            self._row.append("".join(self._cell).strip())
            self._cell = None
        elif tag == "tr" and self._row is not None:
            self.tables[self._table].append(self._row)
            self._row = None
        elif tag == "table":
            self._table = None

    def handle_data(self, data):
        self.text.append(data)
        if self._cell is not None:
            self._cell.append(data)


# ------------------------------------------------------- static structure
@pytest.mark.parametrize("case", ["ready", "limited", "blocked", "job"])
def test_document_is_self_contained(case, reports):
    path, _, _ = reports[case]
    text = path.read_text(encoding="utf-8")
    doc = _Doc(text)
    assert "script" not in doc.tags and not {"link", "iframe", "object", "embed"} & set(doc.tags)
    for tag, key, value in doc.attrs:
        if key in ("src", "href", "srcset", "action", "xlink:href"):
            assert value.startswith(("data:", "#")), (tag, key, value[:60])
    # no URL anywhere (':' and '.' are not base64 characters, so data: images cannot match)
    assert not re.search(r"(?i)(https?:|ftp:|//[a-z0-9-]+\.[a-z]{2,})", text)
    assert doc.tags.count("img") == 6
    assert "Content-Security-Policy" in text and "default-src 'none'" in text


@pytest.mark.parametrize("case", ["ready", "limited", "blocked"])
def test_sections_come_in_order_of_importance(case, reports):
    text = reports[case][0].read_text(encoding="utf-8")
    pos = [text.index(f'<section id="{s}">') for s in SECTIONS]
    assert pos == sorted(pos)
    from meshcheck.report import CAUTION, MODEL
    doc_text = " ".join(_Doc(text).text)
    assert CAUTION in doc_text and MODEL in doc_text


@pytest.mark.parametrize("case", ["ready", "limited", "fixed"])
def test_signed_off_frequency_per_solver_mode_equals_json(case, reports):
    path, d, _ = reports[case]
    rows = _Doc(path.read_text(encoding="utf-8")).tables["solver-modes"][1:]
    by_label = {r[0].replace(" (this audit)", ""): r for r in rows}
    P = d["assumptions"]["max_order"]
    mesh = d["limits_hz"]["mesh"]
    want = {f"variable order, p \u2264 {P}": mesh[str(P)],
            "fixed order p = 1 (linear)": mesh["1"], "fixed order p = 2 (quadratic)": mesh["2"]}
    for label, hz in want.items():
        assert by_label[label][1] == html_report._hz(hz), label
        assert by_label[label][3] == ("yes" if hz >= d["verdict"]["upper_frequency_hz"] else "no")
    # the audit's own mode comes first and reproduces the verdict
    assert "(this audit)" in rows[0][0]
    assert rows[0][1] == html_report._hz(d["verdict"]["signed_off_hz"])
    if case == "fixed":
        assert rows[0][0].startswith("fixed order p = 2")
        assert rows[0][4] == f"{d['sweep']['dofs'][-1]:,}"
    else:
        assert rows[0][4] == f"{d['sweep']['dofs'][-1]:,}"


def test_assumptions_state_the_3d_correction(reports):
    # the default audits apply the correction; the note is the JSON's, escaped once
    import html as _html

    from meshcheck.report import CORRECTION_3D

    text = _html.unescape(reports["ready"][0].read_text(encoding="utf-8"))
    assert "3D correction of the 1D model" in text and CORRECTION_3D[True] in text
    plain = audit(graded_tets(), AuditSettings(frequencies=(100.0, 200.0),
                                               advice=AdviceSettings(correction_3d=False)))
    assert CORRECTION_3D[False] in html_report.render_html(plain)


def test_blocked_mesh_signs_off_nothing(reports):
    path, d, _ = reports["blocked"]
    doc = _Doc(path.read_text(encoding="utf-8"))
    assert d["verdict"]["state"] == "blocked"
    assert "BLOCKED" in doc.text
    assert all(r[1] == "\u2013 (blocked)" for r in doc.tables["solver-modes"][1:])
    assert any("inverted cells" in t for t in doc.text)


def test_tables_give_ids_and_coordinates_in_the_users_unit(reports):
    path, d, res = reports["limited"]
    doc = _Doc(path.read_text(encoding="utf-8"))
    refine = doc.tables["refine-table"]
    assert "centroid (mm)" in refine[0]
    first = d["refine"][0]
    assert refine[1][3] == html_report._xyz(first["centroid"], 3)
    assert refine[1][8].startswith(", ".join(str(i) for i in first["some_cell_ids"][:4]))
    # metres inside the library, millimetres in the report
    np.testing.assert_allclose(first["centroid"], res.refine_clusters[0].centroid * 1000.0)
    worst = doc.tables["worst-table"]
    assert worst[0][-1] == "centroid (mm)" and len(worst) > 1


def test_mesh_strings_are_escaped(reports):
    path, _, _ = reports["xss"]
    text = path.read_text(encoding="utf-8")
    doc = _Doc(text)
    assert "script" not in doc.tags
    assert not [a for a in doc.attrs if a[1].lower().startswith("on")]
    assert XSS not in text and "<img src=x" not in text
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in text
    joined = "".join(doc.text)
    assert XSS in joined  # shown as text
    assert "<img src=x onerror=alert(3)>.msh" in joined


def test_print_stylesheet(reports):
    css = reports["ready"][0].read_text(encoding="utf-8").split("<style>")[1].split("</style>")[0]
    assert re.search(r"@page\s*{[^}]*margin", css)
    media = css[css.index("@media print"):]
    assert "break-before: page" in media and "break-inside: avoid" in media
    for colour in re.findall(r"background:\s*(#[0-9a-f]{3,6})", css):
        rgb = [int(colour[i:i + 2], 16) for i in (1, 3, 5)] if len(colour) == 7 else \
            [int(c * 2, 16) for c in colour[1:]]
        assert min(rgb) >= 0xe0, colour  # light backgrounds only


# ------------------------------------------------ cost, media and geometry checks
def _rows_by_first_cell(table: list[list[str]]) -> tuple[dict[str, int], dict[str, list[str]]]:
    """(column index by header, body rows by first cell without " (this audit)")."""
    col = {h: j for j, h in enumerate(table[0])}
    return col, {r[0].replace(" (this audit)", ""): r for r in table[1:]}


def _md_cost_rows(cost: dict) -> dict[str, list[str]]:
    """Body rows of the Markdown report's cost table (meshcheck.cost.cost_markdown)."""
    out = {}
    for line in cost_markdown(cost):
        if line.startswith("| ") and not line.startswith("| strategy"):
            cells = [c.strip() for c in line.strip().strip("|").split("|")]
            out[cells[0]] = cells
    return out


def _label(strategy: str) -> str:
    return strategy.replace("<=", "\u2264")


@pytest.mark.parametrize("strategy", ["variable p<=8", "fixed p=1", "fixed p=2"])
def test_cost_table_equals_json(strategy, reports):
    path, d, _ = reports["ready"]
    col, rows = _rows_by_first_cell(_Doc(path.read_text(encoding="utf-8")).tables["cost-table"])
    q = next(q for q in d["cost"]["strategies"] if q["strategy"] == strategy)
    row = rows[_label(strategy)]
    top = f"unknowns at {html_report._hz(d['sweep']['frequencies_hz'][-1])} Hz"
    assert row[col[top]] == f"{q['unknowns'][-1]:,}"
    assert row[col["non-zeros"]] == f"{q['nonzeros'][-1]:,}"
    assert row[col["carries every frequency"]] == ("yes" if q["carries_all"] else "no")
    # the same figures as the Markdown report's cost table, formatted from the same JSON
    md = _md_cost_rows(d["cost"])[_label(strategy)]
    assert row[col[top]] == md[1]
    assert row[col["peak memory"]] == md[5]
    # and the printed memory reads back as the JSON's bytes to its three digits
    value, unit = row[col["peak memory"]].split()
    assert float(value) * {"MB": 1e6, "GB": 1e9}[unit] == pytest.approx(
        q["peak_memory_bytes"], rel=5e-3)


def test_cost_table_lists_the_json_strategies_in_order(reports):
    path, d, _ = reports["ready"]
    table = _Doc(path.read_text(encoding="utf-8")).tables["cost-table"]
    labels = [r[0].replace(" (this audit)", "") for r in table[1:]]
    assert labels == [_label(q["strategy"]) for q in d["cost"]["strategies"]]
    assert labels[0].startswith("variable") and "(this audit)" in table[1][0]


@pytest.mark.parametrize("case", ["ready", "limited"])
def test_coarsening_sentence_equals_json_in_the_users_unit(case, reports):
    from meshcheck.cost import audit_job_cost

    path, d, res = reports[case]
    text = " ".join(" ".join(_Doc(path.read_text(encoding="utf-8")).text).split())
    co = d["cost"]["coarsening"]
    assert f"about {round(co['estimated_cells']):,} tetrahedra" in text
    assert f"{co['quote']['unknowns'][-1]:,} unknowns at the top frequency" in text
    assert f"(speed-up {co['speedup']:.3g} over {_label(co['compared_with'])} on the " \
        "supplied mesh)" in text
    assert "target_size" in text and "mesher_size" in text and "*.size.pos" in text
    # target sizes in the user's unit: the size field (metres) times the unit's factor
    unit = d["input"]["unit"]
    m = re.search(rf"target size ([0-9.,e+-]+)(?: to ([0-9.,e+-]+))? {unit}\b", text)
    size = audit_job_cost(res).coarsening.field.size
    lo = float(np.nanmin(size[np.isfinite(size)])) * {"m": 1.0, "mm": 1000.0}[unit]
    assert float(m.group(1).replace(",", "")) == pytest.approx(lo, rel=5e-3)


@pytest.mark.parametrize("case", ["ready", "job"])
def test_cost_and_geometry_are_the_last_subsections_of_the_advice(case, reports):
    text = reports[case][0].read_text(encoding="utf-8")
    start = text.index('<section id="advice">')
    end = text.index("</section>", start)
    geo, cost = text.index("<h3>Geometry checks</h3>"), text.index('<h3 id="cost">')
    assert start < geo < cost < end
    assert "<h3>" not in text[cost + 4:end]  # the cost is the last subsection
    assert re.findall(r'<span class="secno">(\d)</span>', text) == ["1", "2", "3", "4", "5"]


def test_cost_error_renders_the_not_estimated_sentence(reports):
    import copy

    _, d, res = reports["blocked"]
    d = copy.deepcopy(d)
    msg = "no machine constants <machine.json>: run meshcheck calibrate"
    d["cost"] = {"error": msg}
    text = html_report.render_html(res, d)
    doc = _Doc(text)
    assert "cost-table" not in doc.tables
    assert f"The cost of the sweep was not estimated: {msg}." in " ".join(doc.text)
    assert "<machine.json>" not in text and "&lt;machine.json&gt;" in text


MEDIA_CASES = [("ready", None, False), ("job", None, True),
               ("cold_air_no_job", dict(temperature=0.0), False),
               ("job_air_at_30c", dict(job={"temperature": 30.0}), True),
               ("job_plain_air", dict(job={"region": {"air": {"medium": "air"}}}), False),
               ("mesh_file_speed", dict(material_speeds={1: (1481.0, "MAT10")}), True)]


@pytest.mark.parametrize("case,settings,shown", MEDIA_CASES, ids=[c[0] for c in MEDIA_CASES])
def test_media_table_only_when_a_job_sets_media_or_flow(case, settings, shown, reports):
    if settings is None:
        tables = _Doc(reports[case][0].read_text(encoding="utf-8")).tables
    else:
        kw = dict(settings)
        if "job" in kw:
            kw["job"] = parse_job(kw["job"])
        m = tet_box((2, 2, 2))
        if "material_speeds" in kw:  # a speed stated by the mesh file's material card
            m = Mesh(m.points, m.blocks, m.region_names, 3, "deck.bdf", "m",
                     kw.pop("material_speeds"))
        res = audit(m, AuditSettings((100.0,), **kw))
        tables = _Doc(html_report._media(to_dict(res))).tables
    assert ("media-table" in tables) == shown


@pytest.mark.parametrize("case", ["job", "job_xss"])
def test_media_table_names_and_mach_numbers_equal_json(case, reports):
    from meshcheck.acoustics import air_speed

    path, d, _ = reports[case]
    names = JOB_NAMES if case == "job" else XSS_NAMES
    col, rows = _rows_by_first_cell(
        _Doc(path.read_text(encoding="utf-8")).tables["media-table"])
    assert list(rows) == [r["name"] for r in d["media"]] == [names[t] for t in (1, 2, 3)]
    for r in d["media"]:
        assert float(rows[r["name"]][col["Mach"]]) == pytest.approx(r["mach_number"], rel=1e-3)
    # the JSON's Mach number: the job's flow over air at 20 deg C (Kinsler et al. eq. 5.6.8)
    assert float(rows[names[1]][col["Mach"]]) == pytest.approx(JOB_FLOW / air_speed(20.0),
                                                                rel=1e-3)
    assert float(rows[names[2]][col["Mach"]]) == 0.0
    assert rows[names[3]][col["role"]] == f"pml around {names[2]}"


def test_media_table_escapes_region_names(reports):
    text = reports["job_xss"][0].read_text(encoding="utf-8")
    table = text[text.index('<table id="media-table"'):]
    table = table[:table.index("</table>")]
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in table
    assert "&quot; onmouseover=&quot;alert(2)" in table
    assert "&lt;img src=x onerror=alert(4)&gt;" in table
    doc = _Doc(text)
    assert XSS not in text and "<img src=x" not in text and "script" not in doc.tags
    assert not [a for a in doc.attrs if a[1].lower().startswith("on")]


def _expected_checks(d: dict) -> list[tuple[str, str]]:
    """(check, flagged) per geometry check that ran, from the JSON."""
    out = []
    if d["gradation"] is not None:
        out.append(("size jumps", d["gradation"]["count"]))
    if d["curvature"] is not None:
        out.append(("curved boundaries", d["curvature"]["straight_faces_off_surface"]))
    if d["quadratic_cells"] is not None:
        out.append(("quadratic cells", d["quadratic_cells"]["below_threshold"]))
    for lay in d["absorbing_layers"]:
        out.append((f"absorbing layer {lay['name']}", len(lay["messages"])))
    if d["directional_orders"] is not None:
        out.append(("directional orders", d["directional_orders"]["anisotropic_cells"]))
    return [(k, f"{n:,}") for k, n in out]


GEOMETRY_CASES = {"ready": {"size jumps", "curved boundaries"},
                  "job": {"size jumps", "curved boundaries", "absorbing layer pml",
                          "directional orders"},
                  "quadratic": {"size jumps", "curved boundaries", "quadratic cells"}}


@pytest.mark.parametrize("case", list(GEOMETRY_CASES))
def test_geometry_rows_equal_json_counts(case, reports):
    path, d, _ = reports[case]
    table = _Doc(path.read_text(encoding="utf-8")).tables["geometry-table"]
    rows = [(r[0], r[1]) for r in table[1:]]
    assert rows == _expected_checks(d)
    assert {r[0] for r in rows} == GEOMETRY_CASES[case]  # the checks these meshes trigger
    if case == "quadratic":  # the bent mid-node pushes cells below the threshold
        assert int(dict(rows)["quadratic cells"]) > 0


def test_layer_row_in_the_users_unit_and_wavelengths(reports):
    from meshcheck.acoustics import air_speed

    path, d, _ = reports["job"]
    _, rows = _rows_by_first_cell(
        _Doc(path.read_text(encoding="utf-8")).tables["geometry-table"])
    details = rows["absorbing layer pml"][2]
    assert f"thickness {LAYER_T * 1000:g} mm" in details  # built LAYER_T m thick, unit mm
    # thickness over the wavelength in air at the lowest frequency (the PML holds air)
    lam = air_speed(20.0) / JOB_FREQS[0]
    assert f"min {LAYER_T / lam:.3g} / median {LAYER_T / lam:.3g} wavelengths" in details
    assert "cells across min 3 / median 3" in details and "conforming" in details
    for m in d["absorbing_layers"][0]["messages"]:
        assert m["message"].rstrip(".") in details


@pytest.mark.parametrize("case,key", [("job", "gradation"), ("job", "curvature"),
                                      ("job", "absorbing_layers"),
                                      ("job", "directional_orders"),
                                      ("quadratic", "quadratic_cells")])
def test_null_geometry_sections_are_skipped(case, key, reports):
    import copy

    d = copy.deepcopy(reports[case][1])
    before = _expected_checks(d)
    d[key] = [] if key == "absorbing_layers" else None
    after = _expected_checks(d)
    assert len(after) < len(before)
    table = _Doc(html_report._geometry_checks(d)).tables["geometry-table"]
    assert [(r[0], r[1]) for r in table[1:]] == after


def test_no_geometry_check_applied(reports):
    import copy

    d = copy.deepcopy(reports["ready"][1])
    d.update(gradation=None, curvature=None, quadratic_cells=None, absorbing_layers=[],
             directional_orders=None)
    text = html_report._geometry_checks(d)
    assert "No geometry check applied." in text and "<table" not in text


# --------------------------------------------------------------- the CLI
def test_cli_writes_the_html_next_to_the_other_reports(tmp_path):
    import meshio

    m = tet_box((3, 2, 2), size=(0.9, 0.6, 0.6))
    src = tmp_path / "box.vtu"
    meshio.write(src, meshio.Mesh(m.points, [("tetra", m.blocks[0].cells)]))
    out = tmp_path / "out"
    code = main(["audit", str(src), "--units", "m", "--fmax", "300", "--out", str(out), "--quiet"])
    assert code in (0, 1)
    names = sorted(p.name for p in out.iterdir())
    assert {"box.audit.html", "box.audit.json", "box.audit.md", "box.audit.vtu"} <= set(names)
    data = json.loads((out / "box.audit.json").read_text())
    text = (out / "box.audit.html").read_text(encoding="utf-8")
    assert html_report._hz(data["verdict"]["signed_off_hz"]) in text


def test_without_matplotlib_the_cli_skips_the_html_with_a_note(tmp_path, monkeypatch, capsys):
    import sys

    import meshio

    import meshcheck

    monkeypatch.setitem(sys.modules, "matplotlib", None)  # import matplotlib -> ImportError
    monkeypatch.delitem(sys.modules, "meshcheck.figures", raising=False)
    monkeypatch.delattr(meshcheck, "figures", raising=False)
    m = tet_box((2, 2, 2))
    src = tmp_path / "box.vtu"
    meshio.write(src, meshio.Mesh(m.points, [("tetra", m.blocks[0].cells)]))
    out = tmp_path / "out"
    code = main(["audit", str(src), "--units", "m", "--fmax", "100", "--out", str(out)])
    assert code in (0, 1)
    assert not (out / "box.audit.html").exists() and (out / "box.audit.json").exists()
    assert "HTML report skipped" in capsys.readouterr().out
    res = audit(m, AuditSettings(frequencies=(100.0,)))
    with pytest.raises(ImportError, match="matplotlib"):
        html_report.render_html(res)


# ------------------------------------------------------------- the browser
def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class WebDriverError(RuntimeError):
    def __init__(self, status: int, value: dict):
        self.error = value.get("error", "")
        super().__init__(f"{status} {self.error}: {str(value.get('message', ''))[:300]}")


class Browser:
    """Headless Chromium through chromedriver (W3C WebDriver over HTTP, stdlib only)."""

    ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
            "--disable-background-networking", "--disable-component-update", "--disable-sync",
            "--disable-quic", "--disable-extensions", "--disable-default-apps",
            "--hide-scrollbars", "--window-size=1100,1400"]

    def __init__(self, profile: Path, log: Path):
        self.sid = None
        self._log = open(log, "wb")
        port = _free_port()
        self.base = f"http://127.0.0.1:{port}"
        self.proc = subprocess.Popen([CHROMEDRIVER, f"--port={port}"], stdout=self._log,
                                     stderr=subprocess.STDOUT)
        try:
            deadline = time.monotonic() + 30
            while True:
                try:
                    if self._call("GET", "/status").get("ready"):
                        break
                except (OSError, WebDriverError):
                    pass
                if time.monotonic() > deadline or self.proc.poll() is not None:
                    raise RuntimeError(f"chromedriver did not start (log: {log})")
                time.sleep(0.1)
            caps = {"browserName": "chrome",
                    "goog:chromeOptions": {
                        "binary": CHROMIUM, "args": self.ARGS + [f"--user-data-dir={profile}"],
                        "perfLoggingPrefs": {"enableNetwork": True, "enablePage": False}},
                    "goog:loggingPrefs": {"browser": "ALL", "performance": "ALL"}}
            self.sid = self._call("POST", "/session",
                                  {"capabilities": {"alwaysMatch": caps}})["sessionId"]
            self.cmd("POST", "/url", {"url": "about:blank"})  # leave the start page
        except BaseException:
            self.close()
            raise

    def _call(self, method: str, path: str, body=None):
        data = None if body is None else json.dumps(body).encode()
        req = urllib.request.Request(self.base + path, data=data, method=method,
                                     headers={"Content-Type": "application/json"})
        try:
            with urllib.request.urlopen(req, timeout=120) as r:
                return json.loads(r.read())["value"]
        except urllib.error.HTTPError as exc:
            raise WebDriverError(exc.code, json.loads(exc.read()).get("value", {})) from None

    def cmd(self, method: str, path: str, body=None):
        return self._call(method, f"/session/{self.sid}{path}", body)

    def open(self, url: str) -> None:
        self.console(), self.requests()  # drain what earlier pages logged
        self.cmd("POST", "/url", {"url": url})

    def js(self, script: str, *args):
        return self.cmd("POST", "/execute/sync", {"script": script, "args": list(args)})

    def console(self) -> list[dict]:
        """Console and page errors logged since the last call."""
        return self.cmd("POST", "/se/log", {"type": "browser"})

    def requests(self) -> list[str]:
        """URLs of every request sent since the last call (Chromium's network log)."""
        out = []
        for entry in self.cmd("POST", "/se/log", {"type": "performance"}):
            msg = json.loads(entry["message"])["message"]
            if msg["method"] == "Network.requestWillBeSent":
                out.append(msg["params"]["request"]["url"])
        return out

    def screenshot(self, path: Path) -> tuple[int, int]:
        """Full-page PNG; returns its size in CSS pixels."""
        w, h = self.js("return [document.documentElement.scrollWidth,"
                       " document.documentElement.scrollHeight];")
        shot = self.cmd("POST", "/goog/cdp/execute", {"cmd": "Page.captureScreenshot", "params": {
            "format": "png", "captureBeyondViewport": True,
            "clip": {"x": 0, "y": 0, "width": w, "height": h, "scale": 1}}})
        path.write_bytes(base64.b64decode(shot["data"]))
        return w, h

    def pdf(self, width_cm: float, height_cm: float) -> bytes:
        return base64.b64decode(self.cmd("POST", "/print", {
            "page": {"width": width_cm, "height": height_cm}, "background": True}))

    def close(self) -> None:
        if self.sid is not None:
            try:
                self.cmd("DELETE", "")
            except (OSError, WebDriverError):
                pass
            self.sid = None
        if self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(10)
        self._log.close()


@pytest.fixture(scope="module")
def browser(tmp_path_factory):
    if not HAVE_BROWSER:
        pytest.skip("no chromium/chromedriver")
    tmp = tmp_path_factory.mktemp("chromium")
    b = Browser(tmp / "profile", tmp / "chromedriver.log")
    yield b
    b.close()


@pytest.fixture(scope="module")
def artifacts() -> Path:
    env = os.environ.get("MESHCHECK_ARTIFACTS")
    folder = Path(env) if env else Path(__file__).resolve().parent / "artifacts"
    folder.mkdir(parents=True, exist_ok=True)
    if not env:
        (folder / ".gitignore").write_text("*\n")  # test output, never committed
    return folder


_FIGURES_JS = """
return Array.from(document.querySelectorAll('figure img')).map(function (img) {
  var r = img.getBoundingClientRect();
  return {id: img.parentElement.id, complete: img.complete, natural: img.naturalWidth,
          w: r.width, h: r.height};
});"""
_URLS_JS = """
var out = [];
document.querySelectorAll('*').forEach(function (el) {
  ['src', 'href', 'srcset', 'action', 'poster', 'data'].forEach(function (a) {
    if (el.hasAttribute(a)) out.push(el.getAttribute(a).slice(0, 40));
  });
});
return out;"""
_VISIBLE_JS = """
var el = document.querySelector(arguments[0]);
if (!el) return null;
var r = el.getBoundingClientRect(), s = getComputedStyle(el);
return {text: el.innerText, w: r.width, h: r.height, top: r.top,
        visible: s.visibility === 'visible' && s.display !== 'none' && +s.opacity > 0,
        colour: s.color, background: getComputedStyle(document.body).backgroundColor};"""


@needs_browser
@pytest.mark.parametrize("case", ["ready", "limited", "blocked", "job"])
def test_renders_in_chromium_without_errors_or_requests(case, reports, browser, artifacts):
    path, d, _ = reports[case]
    browser.open(path.as_uri())
    assert browser.js("return document.readyState") == "complete"
    errors = [e for e in browser.console() if e["level"] in ("SEVERE", "WARNING")]
    assert errors == []
    sent = browser.requests()
    assert path.as_uri() in sent
    assert [u for u in sent if not u.startswith(("file:", "data:"))] == []
    assert [u for u in browser.js(_URLS_JS) if not u.startswith(("data:", "#"))] == []
    figs = browser.js(_FIGURES_JS)
    assert [f["id"] for f in figs] == [f"fig-{n}" for n in figures.FIGURES]
    for f in figs:
        assert f["complete"] and f["natural"] > 0 and f["w"] > 300 and f["h"] > 100, f
    verdict = browser.js(_VISIBLE_JS, ".verdict .state")
    assert verdict["text"] == d["verdict"]["state"].upper()
    assert verdict["visible"] and verdict["w"] > 0 and verdict["h"] > 0
    assert 0 <= verdict["top"] < 1400  # on the first screen
    headline = browser.js(_VISIBLE_JS, ".verdict .headline")["text"]
    if case != "blocked":
        assert f"Signed off up to {html_report._hz(d['verdict']['signed_off_hz'])} Hz" in headline
    assert browser.js("return document.scripts.length") == 0
    w, h = browser.screenshot(artifacts / f"report-{case}.png")
    assert (artifacts / f"report-{case}.png").stat().st_size > 10_000 and h > 2000


@needs_browser
def test_the_checks_catch_console_errors_and_requests(tmp_path, browser):
    """Negative control: a page that logs an error and loads a remote image is caught."""
    page = tmp_path / "bad.html"
    page.write_text('<!DOCTYPE html><html><body><img src="http://127.0.0.1:9/x.png">'
                    '<script>console.error("boom")</script></body></html>')
    browser.open(page.as_uri())
    time.sleep(0.3)
    assert any("boom" in e["message"] for e in browser.console())
    assert "http://127.0.0.1:9/x.png" in browser.requests()
    assert browser.js(_URLS_JS) == ["http://127.0.0.1:9/x.png"]


@needs_browser
@pytest.mark.parametrize("case", ["xss", "job_xss"])
def test_region_named_script_does_not_run(case, reports, browser, artifacts):
    path, _, _ = reports[case]
    browser.open(path.as_uri())
    assert browser.js("return document.scripts.length") == 0
    with pytest.raises(WebDriverError) as exc:
        browser.cmd("GET", "/alert/text")
    assert exc.value.error == "no such alert"
    body = browser.js("return document.body.innerText")
    assert XSS in body
    assert ("<img src=x onerror=alert(3)>.msh" if case == "xss" else XSS_NAMES[3]) in body
    assert [e for e in browser.console() if e["level"] == "SEVERE"] == []
    browser.screenshot(artifacts / f"report-{case}.png")


@needs_browser
@pytest.mark.parametrize("paper,size_cm,size_pt", [("A4", (21.0, 29.7), (595.92, 841.92)),
                                                   ("Letter", (21.59, 27.94), (612.0, 792.0))])
def test_prints_one_section_per_page_start(paper, size_cm, size_pt, reports, browser, artifacts):
    path, _, _ = reports["limited"]
    browser.open(path.as_uri())
    pdf = browser.pdf(*size_cm)
    (artifacts / f"report-limited-{paper}.pdf").write_bytes(pdf)
    assert pdf.startswith(b"%PDF")
    pages = len(re.findall(rb"/Type\s*/Page(?!s)", pdf))
    assert pages >= len(SECTIONS)  # every section starts a page
    boxes = {tuple(round(float(x), 0) for x in m.split()[2:4])
             for m in re.findall(rb"/MediaBox\s*\[([^\]]+)\]", pdf)}
    assert boxes == {tuple(round(x, 0) for x in size_pt)}


@pytest.mark.parametrize("speed, used", [(1481.0, True), (1.481e6, False)],
                         ids=["used", "implausible"])
def test_assumptions_list_the_mesh_file_speeds_with_the_jsons_note(speed, used):
    import html as _html

    m = tet_box((2, 2, 2))
    m = Mesh(m.points, m.blocks, {1: "<b>fluid</b>"}, 3, "deck.bdf", "m", {1: (speed, "MAT10 4")})
    res = audit(m, AuditSettings((100.0,)))
    d = to_dict(res)
    (ms,) = d["assumptions"]["material_speeds"]
    assert ms["used"] is used
    text = html_report.render_html(res, d)
    assert f"{ms['speed_m_s']:.6g} m/s (MAT10 4), {ms['note']}" in _html.unescape(text)
    assert "<b>fluid</b>" not in text  # the region name is escaped
