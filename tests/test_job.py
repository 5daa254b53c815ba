"""Job files: presets against their formulas, losses against closed forms, validation
messages, command-line overrides, and a two-medium mesh whose limits scale by c_water/c_air."""
import json
import math

import meshio
import numpy as np
import pytest

from meshcheck.acoustics import air_speed
from meshcheck.advice import AdviceSettings
from meshcheck.cli import main
from meshcheck.errors import SettingsError
from meshcheck.job import (Job, RegionSpec, air_density, attenuation_per_wavelength,
                           effective_speed, load_job, loss_speed, parse_job, resolve_media)
from meshcheck.mesh import CellBlock, Mesh
from meshcheck.pipeline import AuditSettings, audit
from meshes import LIMIT_RTOL, hex_box

DB = 20.0 / math.log(10.0)   # dB per neper


def _two_regions(n=(6, 3, 3), size=(1.2, 0.6, 0.6)):
    m = hex_box(n, size=size)
    region = np.where(m.centroids[:, 0] < size[0] / 2, 1, 2)
    return Mesh(m.points, (CellBlock("hexahedron", m.blocks[0].cells, region),),
                {1: "air", 2: "water"}, 3, "two.vtu", "m")


def _write(tmp_path, text, name="job.toml"):
    p = tmp_path / name
    p.write_text(text)
    return p


# ---------------------------------------------------------------- presets and losses
@pytest.mark.parametrize("T", [-20.0, 0.0, 20.0, 40.0])
def test_air_preset_follows_ideal_gas(T):
    # c = 331.3 sqrt(1 + T/273.15) (Kinsler et al. eq. 5.6.8); rho = p0 / (R T) with
    # p0 = 101325 Pa, R = 287.05 J/(kg K)
    media = resolve_media(hex_box((1, 1, 1)), Job(regions=(RegionSpec("air", "air", T),)))
    r = media.regions[1]
    assert r.speed.real == pytest.approx(331.3 * math.sqrt(1 + T / 273.15), rel=1e-14)
    assert r.density == pytest.approx(101325.0 / (287.05 * (T + 273.15)), rel=1e-14)


def test_air_density_at_20c_is_1_204():
    assert air_density(20.0) == pytest.approx(1.204, abs=5e-4)


def test_water_preset():
    r = resolve_media(hex_box((1, 1, 1)), Job(default=RegionSpec(medium="water"))).regions[1]
    assert (r.speed, r.density) == (1481.0, 998.0)


@pytest.mark.parametrize("eta", [0.01, 0.1, 0.5, 2.0])
def test_loss_factor_against_closed_form(eta):
    # c~ = c sqrt(1 + i eta) = c (1 + eta^2)^(1/4) exp(i psi/2), psi = atan(eta):
    # k = (omega/c)(1 + eta^2)^(-1/4) exp(-i psi/2), so |Im k| / Re k = tan(psi / 2)
    # and the phase speed is c (1 + eta^2)^(1/4) / cos(psi / 2)
    c = 340.0
    cs = loss_speed(c, eta)
    psi = math.atan(eta)
    assert effective_speed(cs) == pytest.approx(c * (1 + eta * eta) ** 0.25 / math.cos(psi / 2),
                                                rel=1e-13)
    assert attenuation_per_wavelength(cs) == pytest.approx(DB * 2 * math.pi * math.tan(psi / 2),
                                                           rel=1e-13)


@pytest.mark.parametrize("im", [-30.0, -1.0, 5.0, 80.0])
def test_complex_speed_attenuation_is_set_by_im_over_re(im):
    # 1/(a + ib) = (a - ib)/(a^2 + b^2): |Im k| / Re k = |b| / a, phase speed (a^2 + b^2)/a
    a = 250.0
    assert attenuation_per_wavelength(a + 1j * im) == pytest.approx(DB * 2 * math.pi * abs(im) / a,
                                                                    rel=1e-13)
    assert effective_speed(a + 1j * im) == pytest.approx((a * a + im * im) / a, rel=1e-13)


def test_lossy_region_is_resolved_with_the_real_part_of_k():
    mesh = hex_box((4, 4, 4))
    c = 300.0 + 60.0j
    job = Job(regions=(RegionSpec("air", speed=c),))
    res = audit(mesh, AuditSettings((200.0,), AdviceSettings(max_order=4), job=job))
    ref = audit(mesh, AuditSettings((200.0,), AdviceSettings(max_order=4),
                                    speed=(300.0 ** 2 + 60.0 ** 2) / 300.0))
    assert np.array_equal(res.advice.cell_limit, ref.advice.cell_limit)
    assert res.media.regions[1].attenuation_db == pytest.approx(DB * 2 * math.pi * 0.2)


# ---------------------------------------------------------------- parsing
EXAMPLE = """
temperature = 15.0
[default]
medium = "air"
[region.air]
flow = [10.0, 0.0, 0.0]
[region.2]
medium = "water"
[checks]
gradation_ratio = 3.0
layer_min_cells = 5
"""


def test_example_job_resolves_by_name_and_tag(tmp_path):
    job = load_job(_write(tmp_path, EXAMPLE))
    media = resolve_media(_two_regions(), job)
    assert media.regions[1].speed == pytest.approx(air_speed(15.0))
    assert media.regions[1].flow == (10.0, 0.0, 0.0)
    assert media.regions[2].speed == 1481.0
    assert job.checks.gradation_ratio == 3.0 and job.checks.layer_min_cells == 5
    cs = media.cell_speed
    assert np.all(cs[_two_regions().region == 2] == 1481.0)
    assert np.allclose(media.cell_mach[_two_regions().region == 1], [10.0 / air_speed(15.0), 0, 0])


BAD = [
    ("negative_speed", "[region.air]\nspeed = -340.0\n", "speed -340 m/s must be positive"),
    ("negative_complex", "[region.air]\nspeed = [-1.0, 2.0]\n", "must be positive"),
    ("unknown_key", "[region.air]\nsped = 340.0\n", "unknown key 'sped'"),
    ("unknown_top", "[regions.air]\nspeed = 340.0\n", "unknown entry 'regions'"),
    ("bad_medium", "[region.air]\nmedium = \"helium\"\n", "unknown medium 'helium'"),
    ("water_temperature", "[region.air]\nmedium = \"water\"\ntemperature = 30\n",
     "temperature sets the speed of air only"),
    ("loss_and_complex", "[region.air]\nspeed = [340.0, 3.0]\nloss_factor = 0.1\n",
     "not both"),
    ("negative_loss", "[region.air]\nloss_factor = -0.1\n", "must not be negative"),
    ("custom_no_speed", "[region.air]\nmedium = \"custom\"\n", "needs a speed"),
    ("bad_role", "[region.air]\nrole = \"sponge\"\n", "unknown role 'sponge'"),
    ("surrounds_fluid", "[region.air]\nsurrounds = \"water\"\n", "absorbing layers only"),
    ("flow_scalar", "[region.air]\nflow = 3.0\n", "velocity vector"),
    ("flow_text", "[region.air]\nflow = [\"a\", 0, 0]\n", "must be a number"),
    ("negative_density", "[region.air]\ndensity = -1.0\n", "density -1 kg/m^3"),
    ("cold", "temperature = -300\n", "below absolute zero"),
    ("bad_check", "[checks]\ngradation_ratio = 0.5\n", "gradation_ratio 0.5 must be above 1"),
    ("unknown_check", "[checks]\nratio = 2\n", "unknown key 'ratio'"),
    ("syntax", "[region.air\nspeed = 1\n", "not a valid TOML job file"),
]


@pytest.mark.parametrize("text,msg", [b[1:] for b in BAD], ids=[b[0] for b in BAD])
def test_invalid_job_one_line_message(tmp_path, text, msg):
    with pytest.raises(SettingsError) as exc:
        load_job(_write(tmp_path, text))
    text = str(exc.value)
    assert msg in text and "job.toml" in text and "\n" not in text


RESOLVE_BAD = [
    ("unknown_region", "[region.steam]\nspeed = 400.0\n", "no region 'steam' in the mesh two.vtu; "
                                                         "regions: 1 (air), 2 (water)"),
    ("unknown_tag", "[region.7]\nspeed = 400.0\n", "no region '7'"),
    ("twice", "[region.air]\nspeed = 400.0\n[region.1]\nspeed = 300.0\n", "already given as 'air'"),
    ("mach", "[region.water]\nmedium = \"water\"\nflow = [0.0, 0.0, 1500.0]\n", "Mach 1.01 >= 1"),
    ("self_surround", "[region.water]\nrole = \"pml\"\nsurrounds = \"water\"\n", "itself"),
    ("surrounds_unknown", "[region.water]\nrole = \"pml\"\nsurrounds = \"foam\"\n",
     "no region 'foam'"),
]


@pytest.mark.parametrize("text,msg", [b[1:] for b in RESOLVE_BAD], ids=[b[0] for b in RESOLVE_BAD])
def test_job_against_the_mesh_one_line_message(tmp_path, text, msg):
    job = load_job(_write(tmp_path, text))
    with pytest.raises(SettingsError) as exc:
        resolve_media(_two_regions(), job)
    assert msg in str(exc.value) and "\n" not in str(exc.value)


def test_parse_job_accepts_a_mapping():
    job = parse_job({"region": {"air": {"speed": [300, -3]}}})
    assert job.regions[0].speed == 300 - 3j


# ---------------------------------------------------------------- overrides
def test_command_line_overrides_the_job():
    job = parse_job({"temperature": 0.0, "region": {"air": {"medium": "air", "temperature": 30.0,
                                                            "flow": [5.0, 0, 0]},
                                                    "water": {"loss_factor": 0.3,
                                                              "medium": "water"}}})
    mesh = _two_regions()
    # temperature: every air medium
    m = resolve_media(mesh, job.with_temperature(10.0))
    assert m.regions[1].speed == pytest.approx(air_speed(10.0))
    assert m.regions[2].speed == loss_speed(1481.0, 0.3)
    # --region-speed replaces the speed by a real one, keeps flow and role
    m = resolve_media(mesh, job, region_speeds={"water": 1400.0})
    assert m.regions[2].speed == 1400.0 and m.regions[2].attenuation_db == 0.0
    assert m.regions[1].flow == (5.0, 0.0, 0.0)
    # --speed: every region unless --region-speed names it
    m = resolve_media(mesh, job, speed=500.0, region_speeds={"1": 600.0})
    assert (m.regions[1].speed, m.regions[2].speed) == (600.0, 500.0)


# ---------------------------------------------------------------- two media
def test_two_separate_media_scale_by_the_speed_ratio():
    # two identical boxes (disconnected, so the same L), air and water from the job:
    # the region limits per order scale by exactly c_water / c_air (f = c kh_max / (2 pi h))
    a = hex_box((4, 3, 3), size=(0.8, 0.6, 0.6))
    pts = np.vstack([a.points, a.points + [2.0, 0, 0]])
    cells = np.vstack([a.blocks[0].cells, a.blocks[0].cells + len(a.points)])
    region = np.repeat([1, 2], len(a.blocks[0].cells))
    mesh = Mesh(pts, (CellBlock("hexahedron", cells, region),), {1: "air", 2: "water"})
    job = parse_job({"region": {"air": {"medium": "air"}, "water": {"medium": "water"}}})
    res = audit(mesh, AuditSettings((100.0,), AdviceSettings(max_order=6), job=job))
    lim = res.advice.region_limit(mesh.region)
    assert np.allclose(lim[2] / lim[1], 1481.0 / air_speed(20.0), rtol=LIMIT_RTOL)


def test_glued_media_interior_cells_scale_and_interface_takes_air():
    mesh = _two_regions()
    job = parse_job({"region": {"air": {"medium": "air"}, "water": {"medium": "water"}}})
    res = audit(mesh, AuditSettings((100.0,), AdviceSettings(max_order=6), job=job))
    ref = audit(mesh, AuditSettings((100.0,), AdviceSettings(max_order=6), speed=air_speed(20.0)))
    x = mesh.centroids[:, 0]
    inner_water = x > 0.6 + 0.2   # water cells sharing no node with the interface x = 0.6
    ratio = res.advice.cell_limit[inner_water] / ref.advice.cell_limit[inner_water]
    assert np.allclose(ratio, 1481.0 / air_speed(20.0), rtol=LIMIT_RTOL)
    touching = (x > 0.6) & (x < 0.8)
    assert np.allclose(res.advice.cell_limit[touching], ref.advice.cell_limit[touching])


# ---------------------------------------------------------------- command line
@pytest.fixture
def two_files(tmp_path):
    m = _two_regions()
    path = tmp_path / "two.vtu"
    meshio.write(path, meshio.Mesh(m.points, [("hexahedron", m.blocks[0].cells)],
                                   cell_data={"region": [m.region]}))
    job = _write(tmp_path, "[region.1]\nmedium = \"air\"\nflow = [34.0, 0, 0]\n"
                           "[region.2]\nmedium = \"water\"\nloss_factor = 0.05\n")
    return path, job


def test_cli_job_reaches_the_report(two_files, tmp_path):
    mesh, job = two_files
    out = tmp_path / "out"
    code = main(["audit", str(mesh), "-u", "m", "--fmax", "200", "--job", str(job), "--out",
                 str(out), "--quiet"])
    assert code in (0, 1)
    data = json.loads((out / "two.audit.json").read_text())
    media = {r["tag"]: r for r in data["media"]}
    assert media[1]["mach_number"] == pytest.approx(34.0 / air_speed(20.0))
    assert media[1]["flow_limit_factor_along"] == pytest.approx(1 - 34.0 / air_speed(20.0))
    assert media[2]["attenuation_db_per_wavelength"] == pytest.approx(
        DB * 2 * math.pi * math.tan(math.atan(0.05) / 2))
    for key in ("gradation", "directional_orders", "curvature"):
        assert data[key] is not None


def test_cli_region_speed_and_temperature_override_the_job(two_files, tmp_path):
    mesh, job = two_files
    out = tmp_path / "o"
    main(["audit", str(mesh), "-u", "m", "--fmax", "200", "--job", str(job), "--out", str(out),
          "--quiet", "--region-speed", "2=1000", "--temperature", "0"])
    media = {r["tag"]: r for r in json.loads((out / "two.audit.json").read_text())["media"]}
    assert media[2]["speed_m_s"] == [1000.0, 0.0]
    assert media[1]["speed_m_s"][0] == pytest.approx(air_speed(0.0))


@pytest.mark.parametrize("text,msg", [("[region.9]\nspeed = 3.0\n", "no region '9'"),
                                      ("[region.1]\nspeed = -3.0\n", "must be positive"),
                                      ("[region.1]\nflow = [400.0, 0, 0]\n", ">= 1")],
                         ids=["unknown_region", "negative_speed", "mach"])
def test_cli_bad_job_exits_2_with_one_line(two_files, tmp_path, capsys, text, msg):
    mesh, _ = two_files
    job = _write(tmp_path, text, "bad.toml")
    assert main(["audit", str(mesh), "-u", "m", "--fmax", "200", "--job", str(job),
                 "--out", str(tmp_path / "x")]) == 2
    err = capsys.readouterr().err.strip()
    assert msg in err and len(err.splitlines()) == 1 and "Traceback" not in err


# ------------------------------------------------- speeds stated by the mesh file
def _stated(speeds):
    m = _two_regions()
    return Mesh(m.points, m.blocks, m.region_names, 3, "two.bdf", "m", speeds)


def test_file_speed_sets_its_region_and_scales_the_limits():
    # the usable frequency of an edge is c (kh)_max / (2 pi h): with the same mesh and
    # target, a region whose file card states water has its limits x c_water / c_air
    c_air = air_speed(20.0)
    plain = audit(_stated({}), AuditSettings(frequencies=(500.0,)))
    media = resolve_media(_stated({2: (1481.0, "MAT10 7")}))
    assert media.regions[2].effective_speed == 1481.0
    assert media.regions[2].source == "MAT10 7 in the mesh file"
    assert media.regions[1].effective_speed == pytest.approx(c_air)
    wet = audit(_stated({1: (1481.0, "MAT10 7"), 2: (1481.0, "MAT10 7")}),
                AuditSettings(frequencies=(500.0,)))
    np.testing.assert_allclose(wet.advice.cell_limit, plain.advice.cell_limit * 1481.0 / c_air,
                               rtol=LIMIT_RTOL)


def test_job_entry_and_command_line_win_over_the_file():
    mesh = _stated({1: (1481.0, "MAT10 7"), 2: (1481.0, "MAT10 7")})
    job = parse_job({"region": {"air": {"medium": "air"}}}, "job.toml")
    media = resolve_media(mesh, job, region_speeds={"water": 1400.0})
    assert media.regions[1].source.startswith("air at 20")  # the job names region 1
    assert media.regions[2].effective_speed == 1400.0       # --region-speed
    assert resolve_media(mesh, speed=340.0).regions[2].effective_speed == 340.0  # --speed


def test_implausible_file_speed_is_reported_not_used():
    # a deck in mm-t-s units read with --units m: MAT10 C = 1.481e6 (mm/s) would mean
    # 1481 km/s; it is listed in the report with the reason and air is kept
    from meshcheck.report import to_dict

    res = audit(_stated({2: (1.481e6, "MAT10 7")}), AuditSettings(frequencies=(500.0,)))
    assert res.media.regions[2].effective_speed == pytest.approx(air_speed(20.0))
    (ms,) = to_dict(res)["assumptions"]["material_speeds"]
    assert ms["used"] is False and "another length unit" in ms["note"]
    assert ms["region"] == 2 and ms["card"] == "MAT10 7"
