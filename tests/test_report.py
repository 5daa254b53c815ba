"""The JSON and Markdown reports state whether the 3D correction of the 1D model is applied;
the report's statistics equal their numpy references."""
import json
import threading
import time
from types import SimpleNamespace

import numpy as np
import pytest

from meshcheck import advice as advice_module
from meshcheck.advice import Advice, AdviceSettings, region_runs
from meshcheck.pipeline import AuditSettings, audit
from meshcheck.quality import metric_stats as _metric_stats
from meshcheck.report import CORRECTION_3D, _region_cells, to_dict, write_markdown
from meshes import tet_box


@pytest.fixture(scope="module")
def reports(tmp_path_factory):
    """correction_3d -> (JSON dict, Markdown text) of a small tet audit."""
    folder = tmp_path_factory.mktemp("reports")
    mesh = tet_box((3, 2, 2))
    out = {}
    for corr in (True, False):
        res = audit(mesh, AuditSettings((200.0,), AdviceSettings(correction_3d=corr)))
        d = json.loads(json.dumps(to_dict(res), allow_nan=False))  # what write_json stores
        md = write_markdown(res, folder / f"{corr}.md", d).read_text()
        out[corr] = d, md
    return out


def test_default_report_says_the_correction_is_applied():
    d = to_dict(audit(tet_box((2, 2, 2)), AuditSettings((200.0,))))
    assert d["assumptions"]["correction_3d"] is True
    assert d["assumptions"]["correction_3d_note"].startswith(
        "applied (fitted factors, docs/validation.md)")


@pytest.mark.parametrize("corr", [True, False], ids=["applied", "plain"])
def test_json_states_the_correction(reports, corr):
    asm = reports[corr][0]["assumptions"]
    assert asm["correction_3d"] is corr
    assert asm["correction_3d_note"] == CORRECTION_3D[corr]
    assert asm["correction_3d_note"].startswith("applied" if corr else "not applied")


@pytest.mark.parametrize("corr", [True, False], ids=["applied", "plain"])
def test_markdown_states_the_correction(reports, corr):
    md = reports[corr][1]
    word = "applied" if corr else "not applied"
    assert f"3D correction of the 1D model {word}." in md  # the assumptions line
    assert f"- 3D correction of the 1D model: {CORRECTION_3D[corr]}." in md  # the method


def _reference_stats(values, bad, k):
    """What the report computed before one partition served all quantiles."""
    from meshcheck.quality import _smallest
    ok = np.isfinite(values)
    v = values[ok]
    ids = np.flatnonzero(ok)
    worst = ids[_smallest(v if bad == "low" else -v, k)]
    p05, p95 = np.percentile(v, [5, 95])
    return {"cells": int(ok.sum()), "min": float(v.min()), "p05": float(p05),
            "median": float(np.median(v)), "p95": float(p95), "max": float(v.max()),
            "worst": worst}


@pytest.mark.parametrize("n", [1, 2, 7, 10, 11, 1000, 1001])
@pytest.mark.parametrize("bad", ["low", "high"])
def test_metric_stats_equal_numpys_percentile_median_and_sort(n, bad):
    rng = np.random.default_rng(n)
    for trial in range(4):
        v = rng.normal(size=n)
        if trial >= 1:  # ties
            v = np.round(v, 1)
        if trial >= 2 and n > 2:  # non-finite values are left out
            v[rng.integers(0, n, max(1, n // 5))] = [np.nan, np.inf, -np.inf][trial % 3]
        if trial == 3:
            v[:] = np.nan if n < 3 else v
        got = _metric_stats(v, bad, 10)
        if not np.isfinite(v).any():
            assert got is None
            continue
        ref = _reference_stats(v, bad, 10)
        assert np.array_equal(got.pop("worst"), ref.pop("worst"))
        assert got == ref  # floats to the bit
        # a sorted copy states the same
        s = np.sort(v[np.isfinite(v)])
        assert got["min"] == s[0] and got["max"] == s[-1]


@pytest.mark.parametrize("shared", [False, True])
@pytest.mark.parametrize("layout", ["one", "runs", "scattered"])
def test_region_limits_cells_and_volumes_equal_the_masked_reference(layout, shared):
    rng = np.random.default_rng(5)
    n = 3000
    region = {"one": np.full(n, 4), "runs": np.repeat([3, 1, 3, 2], [700, 900, 400, 1000]),
              "scattered": rng.integers(1, 4, n)}[layout]
    runs = region_runs(region)
    assert (runs is None) == (layout == "scattered")
    vol = rng.normal(size=n) * 1e-6
    if shared:  # cells sharing rows of limits (the compiled advice), some rows NaN
        rows = np.maximum.accumulate(rng.uniform(10.0, 1e3, (n // 3, 5)), axis=1)
        rows[7, 2:] = np.nan
        index = rng.permutation(np.r_[np.arange(len(rows)),  # every row used
                                      rng.integers(0, len(rows), n - len(rows))]).astype(np.int32)
        lim = rows[index]
        adv = SimpleNamespace(limit_rows=rows, limit_row=index)
    else:
        lim = np.maximum.accumulate(rng.uniform(10.0, 1e3, (n, 5)), axis=1)
        adv = SimpleNamespace(limit_rows=lim, limit_row=None)
    got = Advice.region_limit(adv, region)
    tags = np.unique(region)
    assert list(got) == tags.tolist()
    for tag, cells_, first, v in [(t, c, f, x) for t, _, c, f, x in
                                  _region_cells(region, vol, got)]:
        sel = region == tag
        assert np.array_equal(got[tag], lim[sel].min(axis=0), equal_nan=True)
        assert cells_ == sel.sum() and first == np.flatnonzero(sel)[0]
        assert v == float(np.abs(vol[sel]).sum())  # the same sum, to the bit


@pytest.mark.parametrize("piece", [1 << 16, 64])
@pytest.mark.parametrize("shared", [False, True])
def test_lowest_cell_is_numpys_argmin_of_the_per_cell_limits(shared, piece, monkeypatch):
    """The report's limiting cell: np.argmin over the cells' limits (first of tied
    minima; the first NaN where one is NaN), found on shared rows without them (the
    cells looked at in pieces: one, or many)."""
    rng = np.random.default_rng(8)
    n = 2000
    rows = np.round(np.maximum.accumulate(rng.uniform(10.0, 1e3, (n // 4, 5)), axis=1), -1)
    rows[[5, 90], 3] = np.nan  # a NaN limit at order 4
    rows[rng.choice(len(rows), 7, replace=False), 4] = 5.0  # 7 rows tied lowest at order 5
    index = rng.permutation(np.r_[np.arange(len(rows)),
                                  rng.integers(0, len(rows), n - len(rows))]).astype(np.int32)
    lim = rows[index]
    adv = (SimpleNamespace(limit_rows=rows, limit_row=index) if shared else
           SimpleNamespace(limit_rows=lim, limit_row=None))
    adv.mesh_limit = rows.min(axis=0).astype(np.float64)  # as Advice's (NaN propagates)
    monkeypatch.setattr(advice_module, "LOWEST_PIECE", piece)
    for p in range(1, 6):
        assert Advice.lowest_cell(adv, p) == int(np.argmin(lim[:, p - 1])), p
    assert np.isnan(lim[Advice.lowest_cell(adv, 4), 3])
    assert max(int(np.argmin(lim[:, p])) for p in range(5)) > 64  # past the first piece
    assert np.sum(lim[:, 0] == lim[:, 0].min()) > 1  # ties: the first one is meant
    assert np.sum(rows[:, 0] == rows[:, 0].min()) in (2, 3, 4)  # a few tied rows
    assert np.sum(rows[:, 4] == 5.0) == 7  # and more than a few


def test_quality_section_of_large_meshes_equals_the_numpy_statistics(monkeypatch):
    # large meshes summarise each metric by the compiled radix selection
    # (meshcheck.kernels.stats): the statistics must not change
    from meshcheck.kernels import stats
    from meshcheck.quality import mesh_quality, summarise

    q = mesh_quality(tet_box((7, 6, 5)))
    calls = []
    real = stats.metric_summary
    monkeypatch.setattr(stats, "metric_summary", lambda *a: calls.append(1) or real(*a))
    monkeypatch.setenv("MESHCHECK_KERNELS", "numpy")
    want = summarise(q)
    assert not calls
    monkeypatch.setenv("MESHCHECK_KERNELS", "numba")
    got = summarise(q)
    assert len(calls) == len(q.metrics)
    assert got.keys() == want.keys()
    assert sum(w is not None for w in want.values()) >= 6  # a tet's metrics
    for name in want:
        if want[name] is None:
            assert got[name] is None, name
            continue
        g, w = dict(got[name]), dict(want[name])
        assert np.array_equal(g.pop("worst"), w.pop("worst")), name
        assert g == w, name


def test_audit_keeps_float32_metrics_and_reports_the_float64_statistics():
    """The audit narrows its metrics to float32 after summarising them: the JSON's quality
    section equals the one made from the float64 metrics, the flags are theirs, and the
    kept values are their float32 roundings."""
    from dataclasses import replace

    from meshcheck import report
    from meshcheck.quality import mesh_quality, out_of_range

    mesh = tet_box((6, 5, 4))
    rng = np.random.default_rng(3)  # distorted cells: metrics of many values, some flagged
    mesh = replace(mesh, points=mesh.points + rng.uniform(-0.04, 0.04, mesh.points.shape))
    res = audit(mesh, AuditSettings((300.0,)))
    q64 = mesh_quality(mesh)
    assert report._quality(res, 1.0) == report._quality(
        replace(res, quality=q64, quality_summary=None), 1.0)
    flags = out_of_range(q64, mesh, res.settings.quality)
    assert all(np.array_equal(res.quality_flags[k], flags[k]) for k in flags)
    for name, v in q64.metrics.items():
        kept = res.quality.metrics[name]
        assert kept.dtype == np.float32
        assert np.array_equal(kept, v.astype(np.float32), equal_nan=True), name


@pytest.mark.parametrize("compress", [True, False])
def test_vtu_cell_arrays_are_the_audit_arrays(tmp_path, monkeypatch, kernel_mode, compress):
    # the VTU's cell arrays, made whole (compressed) or a piece at a time (uncompressed,
    # pieces of 111 bytes), read back by meshio: the audit's arrays in the mesh's unit
    import meshio

    from meshcheck import vtkxml
    from meshcheck.mesh import CellBlock, Mesh
    from meshcheck.report import write_vtu

    monkeypatch.setattr(vtkxml, "_CHUNK", 3 * 37)
    box = tet_box((6, 5, 4), size=(600.0, 500.0, 400.0))  # millimetres
    rng = np.random.default_rng(2)
    b = box.blocks[0]
    mesh = Mesh(box.points + rng.uniform(-20, 20, box.points.shape),
                (CellBlock(b.type, b.cells, np.where(np.arange(len(b)) % 3 == 0, 7, 2)),),
                unit="mm")
    res = audit(mesh, AuditSettings((900.0,)))
    a = res.advice
    back = meshio.read(write_vtu(res, tmp_path / "a.vtu", compress=compress))
    got = {k: v[0] for k, v in back.cell_data.items()}
    f32 = np.float32
    want = {"region": mesh.region.astype(np.int32), "refine": a.refine.astype(np.int8),
            "coarsen": a.coarsen.astype(np.int8), "order_needed": a.cell_order,
            "largest_edge": (a.cell_size / 1e-3).astype(f32),
            "target_size": (a.target_size / 1e-3).astype(f32),
            "coarsen_ratio": a.coarsen_ratio.astype(f32),
            **{f"limit_hz_p{p}": a.limit_at(p, f32) for p in range(1, 9)},
            **{f"quality_{k}": v for k, v in res.quality.metrics.items()
               if np.isfinite(v).any()}}
    assert (a.limit_row is not None) == (kernel_mode == "numba")
    assert set(np.unique(mesh.region)) == {2, 7} and len(np.unique(a.cell_size)) > 100
    for k, v in want.items():
        assert got[k].dtype == v.dtype and np.array_equal(got[k], v, equal_nan=True), k


# ------------------------------------------------------------------ the VTU written early
def _early_audit(mesh, settings, path, advised=True):
    """(result, path written) of an audit whose VTU an EarlyVTU writes beside it (given
    the advice before the sweep when ``advised``, as the CLI does)."""
    from meshcheck.report import EarlyVTU

    early = EarlyVTU(mesh, settings, path)
    try:
        res = audit(mesh, settings, cells_checked=early.start,
                    advised=early.advised if advised else None)
    except BaseException:
        early.abort()
        raise
    early.finish(res)
    return res, early.result()


@pytest.mark.parametrize("advised", [True, False], ids=["advised", "at the end"])
@pytest.mark.parametrize("stored", [False, True], ids=["compressed", "stored"])
def test_vtu_written_during_the_audit_is_the_vtu_of_the_result(tmp_path, monkeypatch,
                                                               kernel_mode, stored, advised):
    # the cells, points and metrics written while the topology and advice are worked out,
    # the rest once the audit is over: the same bytes as the finished result's VTU
    from meshcheck import pipeline, report, vtkxml
    from meshcheck.report import write_vtu

    monkeypatch.setattr(vtkxml, "_CHUNK", 3 * 37)
    monkeypatch.setattr(pipeline, "OVERLAP_CELLS", 0)  # the cell checks on their thread
    if stored:  # as large meshes are written: uncompressed, a piece at a time
        monkeypatch.setattr(report, "VTU_COMPRESS_CELLS", 0)
    mesh = tet_box((6, 5, 4))
    settings = AuditSettings((300.0, 900.0))
    res, got = _early_audit(mesh, settings, tmp_path / "early.vtu", advised)
    assert got == tmp_path / "early.vtu"
    want = write_vtu(res, tmp_path / "after.vtu")
    assert got.read_bytes() == want.read_bytes()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["after.vtu", "early.vtu"]


@pytest.mark.parametrize("when", ["before the advice", "after the advice"])
def test_vtu_of_a_failed_audit_leaves_no_file_and_an_earlier_one_as_it_was(tmp_path,
                                                                          monkeypatch, when):
    # the audit stops after the cell checks (a region the mesh has not), or in its last
    # stage: the writer is stopped, its temporary file removed and a report already at
    # the path kept
    from meshcheck import pipeline
    from meshcheck.errors import SettingsError

    mesh = tet_box((4, 3, 3))
    path = tmp_path / "box.audit.vtu"
    path.write_bytes(b"an earlier report")
    settings = AuditSettings((300.0,), region_speeds={"nowhere": 300.0})
    if when == "after the advice":
        settings = AuditSettings((300.0,))

        def fail(*args):
            time.sleep(0.2)  # the writer has long written what it can
            raise SettingsError("no region 'nowhere'")
        monkeypatch.setattr(pipeline, "_geometry_checks", fail)
    with pytest.raises(SettingsError, match="no region 'nowhere'"):
        _early_audit(mesh, settings, path)
    assert path.read_bytes() == b"an earlier report"
    assert [p.name for p in tmp_path.iterdir()] == ["box.audit.vtu"]


def test_vtu_writes_the_advice_arrays_while_the_sweep_runs(tmp_path, monkeypatch):
    # handed the advice before the sweep, the writer gets through every cell array and
    # waits for the finished result (the size field's point data) while the sweep has
    # not even started: here the sweep waits for that moment (it would wait in vain if
    # the advice's arrays needed the finished result)
    from meshcheck import pipeline, report
    from meshcheck.report import EarlyVTU, write_vtu

    monkeypatch.setattr(report, "VTU_COMPRESS_CELLS", 0)
    waiting, final = threading.Event(), EarlyVTU.final

    def final_(self):
        waiting.set()
        return final(self)

    def sweep_(*args, _sweep=pipeline.sweep):
        assert waiting.wait(20), "the writer did not reach the point data before the sweep"
        return _sweep(*args)

    monkeypatch.setattr(EarlyVTU, "final", final_)
    monkeypatch.setattr(pipeline, "sweep", sweep_)
    mesh, settings = tet_box((4, 3, 3)), AuditSettings((300.0, 600.0))
    res, got = _early_audit(mesh, settings, tmp_path / "early.vtu")
    assert got.read_bytes() == write_vtu(res, tmp_path / "after.vtu").read_bytes()


def test_advised_result_falls_back_to_the_result_or_its_failure(tmp_path):
    from meshcheck.report import EarlyVTU, _Aborted

    mesh, settings = tet_box((2, 2, 2)), AuditSettings((300.0,))
    res = audit(mesh, settings)
    early = EarlyVTU(mesh, settings, tmp_path / "x.vtu")
    early.finish(res)  # never advised: the result's own
    got = early.advised_result()
    assert got[0] is res.advice and got[1] is res.min_scaled_jacobian
    early = EarlyVTU(mesh, settings, tmp_path / "y.vtu")
    early.abort()  # the audit failed before the advice: the writer's wait ends in an error
    with pytest.raises(_Aborted):
        early.advised_result()


def test_vtu_writer_error_is_raised_by_its_result(tmp_path):
    from meshcheck.report import EarlyVTU

    early = EarlyVTU(tet_box((2, 2, 2)), AuditSettings((300.0,)), tmp_path / "no" / "x.vtu")
    res = audit(early.mesh, early.settings, cells_checked=early.start)
    early.finish(res)
    with pytest.raises(OSError):
        early.result()
    assert not (tmp_path / "no").exists()


def test_vtu_never_started_is_written_when_asked_for(tmp_path):
    # an audit that never hands over its cells' metrics (here: run without the hook)
    # still gets its file, written when the path is asked for
    from meshcheck.report import EarlyVTU, write_vtu

    mesh, settings = tet_box((3, 2, 2)), AuditSettings((300.0,))
    early = EarlyVTU(mesh, settings, tmp_path / "late.vtu")
    res = audit(mesh, settings)
    early.finish(res)
    assert early.result().read_bytes() == write_vtu(res, tmp_path / "ref.vtu").read_bytes()


def test_abs_sum_is_numpys_sum_of_abs_to_the_bit():
    # the regions' volumes: the sum of |volume| without the copy when none is negative
    from meshcheck.report import _abs_sum

    rng = np.random.default_rng(3)
    cases = {"positive": rng.uniform(1e-9, 1e-6, 100_003), "mixed": rng.normal(size=5001),
             "negative zeros": np.full(10, -0.0), "with zeros": np.r_[0.0, -0.0, 1.5, 2.25],
             "nan": np.r_[1.0, np.nan, 2.0], "empty": np.zeros(0)}
    for name, x in cases.items():
        want = float(np.abs(x).sum())
        got = _abs_sum(x)
        assert (got == want or (np.isnan(got) and np.isnan(want))), name
        assert np.signbit(got) == np.signbit(want), name
