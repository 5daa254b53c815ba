"""The JSON and Markdown reports state whether the 3D correction of the 1D model is applied."""
import json

import pytest

from meshcheck.advice import AdviceSettings
from meshcheck.pipeline import AuditSettings, audit
from meshcheck.report import CORRECTION_3D, to_dict, write_markdown
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
