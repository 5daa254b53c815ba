"""Job files: the media, mean flows and roles of the regions of a mesh (TOML).

A job file names, per region (by name, case-insensitive, or by integer tag),
the fluid it holds and what it is for::

    temperature = 20.0              # deg C: air regions without their own (optional)

    [default]                       # regions not listed (optional; default: air)
    medium = "air"

    [region.cavity_air]             # by name; [region.2] selects tag 2
    medium = "air"                  # "air" | "water" (presets) | "custom"
    temperature = 25.0              # deg C, air only
    flow = [34.0, 0.0, 0.0]         # uniform mean-flow velocity, m/s

    [region.foam]
    speed = 210.0                   # m/s; [re, im] for a complex speed
    density = 25.0                  # kg/m^3
    loss_factor = 0.2               # complex modulus K(1 + i eta): c = c0 sqrt(1 + i eta)

    [region.pml]
    role = "pml"                    # "fluid" (default) | "absorbing_layer" | "pml"
    surrounds = "cavity_air"        # the region the layer wraps (default: its neighbours)

    [checks]                        # thresholds of the geometry checks (all optional)
    gradation_ratio = 2.0

Presets (SI):

* air: c = 331.3 sqrt(1 + T/273.15) m/s (ideal gas, dry air; Kinsler, Frey,
  Coppens & Sanders, "Fundamentals of Acoustics", 4th ed., 2000, eq. 5.6.8);
  rho = p0 / (R T) with p0 = 101325 Pa and R = 287.05 J/(kg K) (ideal gas with
  the dry-air gas constant of the ISO 2533 standard atmosphere, value from
  memory): 1.204 kg/m^3 at 20 deg C.
* water: c = 1481 m/s, rho = 998 kg/m^3 (fresh water at 20 deg C; Kinsler et
  al., Table A10; values from memory).

Lossy and equivalent fluids: the wavenumber k = omega / c~ is complex.  Its
real part sets the resolution (the advisor uses the phase speed
c_eff = 1 / Re(1/c~)); the attenuation over one wavelength is
20 log10(e) * 2 pi |Im k| / Re k dB, independent of frequency for a constant c~.
Either sign convention of the imaginary part is accepted (|Im k| is used).

Command-line options override the file: ``--temperature`` every air medium,
``--speed`` every region, ``--region-speed`` one region (an override replaces
the speed by a real, lossless one; flow and role are kept).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any, Mapping

import numpy as np

from .acoustics import WATER_SPEED, air_speed
from .errors import SettingsError
from .mesh import Mesh

__all__ = ["Checks", "RegionSpec", "Job", "RegionMedium", "Media", "load_job", "parse_job",
           "resolve_media", "air_density", "attenuation_per_wavelength", "effective_speed",
           "loss_speed", "ROLES", "LAYER_ROLES", "WATER_DENSITY"]

#: standard atmospheric pressure, Pa, and the specific gas constant of dry air, J/(kg K)
P0, R_AIR = 101325.0, 287.05
WATER_DENSITY = 998.0
ROLES = ("fluid", "absorbing_layer", "pml")
LAYER_ROLES = frozenset({"absorbing_layer", "pml"})
MEDIA = ("air", "water", "custom")
DB_PER_NEPER = 20.0 / math.log(10.0)


def air_density(temperature_c: float = 20.0) -> float:
    """Density of dry air at 101325 Pa, kg/m^3 (ideal gas), temperature in deg C."""
    air_speed(temperature_c)  # range check
    return P0 / (R_AIR * (temperature_c + 273.15))


def loss_speed(speed: float, loss_factor: float) -> complex:
    """Complex speed c sqrt(1 + i eta) of a fluid whose bulk modulus is K (1 + i eta)."""
    return complex(speed) * complex(np.sqrt(1.0 + 1j * loss_factor))


def effective_speed(speed) -> np.ndarray:
    """Phase speed omega / Re k = 1 / Re(1/c~), m/s (float64; c~ may be complex)."""
    return 1.0 / np.real(1.0 / np.asarray(speed, dtype=np.complex128))


def attenuation_per_wavelength(speed) -> np.ndarray:
    """Amplitude decay over one wavelength, dB: 20 log10(e) 2 pi |Im k| / Re k."""
    s = 1.0 / np.asarray(speed, dtype=np.complex128)  # k / omega
    return DB_PER_NEPER * 2.0 * np.pi * np.abs(np.imag(s)) / np.real(s)


@dataclass(frozen=True)
class Checks:
    """Thresholds of the geometry checks (all "common practice, no source").

    gradation_ratio : neighbours whose sizes differ by more than this factor are a jump.
    feature_angle : deg; boundary edges whose faces meet at a larger angle are sharp
        features (not curvature).
    layer_min_wavelengths : absorbing layers thinner than this at the lowest frequency
        are flagged.
    layer_max_wavelengths : thicker layers are noted as costly.
    layer_min_cells : fewer cells across a layer are flagged.
    jacobian_ratio_min : quadratic cells whose min/max det J is below this are flagged.
    max_listed : how many locations each list keeps.
    """

    gradation_ratio: float = 2.0
    feature_angle: float = 50.0
    layer_min_wavelengths: float = 0.25
    layer_max_wavelengths: float = 2.0
    layer_min_cells: int = 4
    jacobian_ratio_min: float = 0.3
    max_listed: int = 20

    def __post_init__(self):
        if not self.gradation_ratio > 1:
            raise SettingsError(f"gradation_ratio {self.gradation_ratio} must be above 1")
        if not 0 < self.feature_angle < 180:
            raise SettingsError(f"feature_angle {self.feature_angle} deg must lie in (0, 180)")
        if not 0 < self.layer_min_wavelengths < self.layer_max_wavelengths:
            raise SettingsError("layer wavelengths: need 0 < layer_min_wavelengths < "
                                "layer_max_wavelengths")
        if not self.layer_min_cells >= 1:
            raise SettingsError("layer_min_cells must be at least 1")
        if not 0 < self.jacobian_ratio_min <= 1:
            raise SettingsError("jacobian_ratio_min must lie in (0, 1]")
        if not self.max_listed >= 1:
            raise SettingsError("max_listed must be at least 1")


@dataclass(frozen=True)
class RegionSpec:
    """One region's entry as written in the job file (validated, not yet resolved).

    key : the region as named in the file (name or tag); "" for the default entry.
    medium : "air", "water", "custom" or None (air unless a speed is given).
    temperature : deg C (air only) or None.
    speed : m/s, complex for a lossy fluid, or None (from the preset).
    density : kg/m^3 or None (from the preset).
    loss_factor : eta >= 0 of the bulk modulus, or None.
    flow : (3,) mean-flow velocity, m/s, or None.
    role : one of ``ROLES``.  surrounds : key of the region a layer wraps, or None.
    """

    key: str = ""
    medium: str | None = None
    temperature: float | None = None
    speed: complex | None = None
    density: float | None = None
    loss_factor: float | None = None
    flow: tuple[float, float, float] | None = None
    role: str = "fluid"
    surrounds: str | None = None


@dataclass(frozen=True)
class Job:
    """A parsed job file.

    path : where it came from (for messages).  temperature : deg C default for air
    regions, or None (then the audit's temperature).  default : entry for regions not
    listed.  regions : the listed entries.  checks : thresholds.
    """

    path: str = ""
    temperature: float | None = None
    default: RegionSpec = RegionSpec()
    regions: tuple[RegionSpec, ...] = ()
    checks: Checks = Checks()

    def with_temperature(self, temperature: float) -> "Job":
        """A copy in which every air medium is at ``temperature`` deg C (CLI override)."""
        air_speed(temperature)

        def fix(r: RegionSpec) -> RegionSpec:
            is_air = r.medium == "air" or (r.medium is None and r.speed is None)
            return replace(r, temperature=float(temperature)) if is_air else r

        return replace(self, temperature=float(temperature), default=fix(self.default),
                       regions=tuple(fix(r) for r in self.regions))


# ------------------------------------------------------------------ parsing
_REGION_KEYS = {"medium", "temperature", "speed", "density", "loss_factor", "flow", "role",
                "surrounds"}
_TOP_KEYS = {"temperature", "default", "region", "checks"}


def _where(path: str, section: str) -> str:
    return f"{path or 'job'}: [{section}]" if section else f"{path or 'job'}"


def _number(value, what: str, where: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise SettingsError(f"{where}: {what} must be a number, not {value!r}")
    v = float(value)
    if not math.isfinite(v):
        raise SettingsError(f"{where}: {what} must be finite, not {value!r}")
    return v


def _speed(value, where: str) -> complex:
    if isinstance(value, list):
        if len(value) != 2:
            raise SettingsError(f"{where}: a complex speed is written [real, imaginary] in m/s, "
                                f"not {value!r}")
        c = complex(_number(value[0], "speed", where), _number(value[1], "speed", where))
    else:
        c = complex(_number(value, "speed", where), 0.0)
    if not c.real > 0:
        raise SettingsError(f"{where}: speed {_fmt_c(c)} m/s must be positive")
    return c


def _fmt_c(c: complex) -> str:
    return f"{c.real:g}" if c.imag == 0 else f"{c.real:g}{c.imag:+g}i"


def _region(key: str, table: Any, where: str) -> RegionSpec:
    if not isinstance(table, dict):
        raise SettingsError(f"{where}: expected a table of settings, not {table!r}")
    unknown = sorted(set(table) - _REGION_KEYS)
    if unknown:
        raise SettingsError(f"{where}: unknown key '{unknown[0]}' (known: "
                            f"{', '.join(sorted(_REGION_KEYS))})")
    medium = table.get("medium")
    if medium is not None:
        medium = str(medium).lower()
        if medium not in MEDIA:
            raise SettingsError(f"{where}: unknown medium '{table['medium']}' (use air, water or "
                                "custom with a speed)")
    temperature = table.get("temperature")
    if temperature is not None:
        temperature = _number(temperature, "temperature", where)
        if medium not in (None, "air") or "speed" in table:
            raise SettingsError(f"{where}: temperature sets the speed of air only; give a speed "
                                "for other media")
        if temperature <= -273.15:
            raise SettingsError(f"{where}: temperature {temperature} deg C is below absolute zero")
    speed = _speed(table["speed"], where) if "speed" in table else None
    if medium == "custom" and speed is None:
        raise SettingsError(f"{where}: a custom medium needs a speed (m/s)")
    density = table.get("density")
    if density is not None:
        density = _number(density, "density", where)
        if not density > 0:
            raise SettingsError(f"{where}: density {density:g} kg/m^3 must be positive")
    loss = table.get("loss_factor")
    if loss is not None:
        loss = _number(loss, "loss_factor", where)
        if loss < 0:
            raise SettingsError(f"{where}: loss_factor {loss} must not be negative")
        if speed is not None and speed.imag != 0:
            raise SettingsError(f"{where}: give a complex speed or a loss factor, not both")
    flow = table.get("flow")
    if flow is not None:
        if not isinstance(flow, list) or len(flow) not in (2, 3):
            raise SettingsError(f"{where}: flow is a velocity vector [ux, uy, uz] in m/s, "
                                f"not {flow!r}")
        flow = tuple(_number(v, "flow", where) for v in flow) + (0.0,) * (3 - len(flow))
    role = str(table.get("role", "fluid")).lower()
    if role not in ROLES:
        raise SettingsError(f"{where}: unknown role '{table['role']}' (use {', '.join(ROLES)})")
    surrounds = table.get("surrounds")
    if surrounds is not None:
        surrounds = str(surrounds)
        if role not in LAYER_ROLES:
            raise SettingsError(f"{where}: 'surrounds' applies to absorbing layers only "
                                "(role = \"pml\" or \"absorbing_layer\")")
    return RegionSpec(key, medium, temperature, speed, density, loss, flow, role, surrounds)


def parse_job(data: Mapping[str, Any], path: str = "") -> Job:
    """Validate the parsed TOML of a job file (a mapping); raises SettingsError."""
    unknown = sorted(set(data) - _TOP_KEYS)
    if unknown:
        raise SettingsError(f"{_where(path, '')}: unknown entry '{unknown[0]}' (known: "
                            f"{', '.join(sorted(_TOP_KEYS))})")
    temperature = data.get("temperature")
    if temperature is not None:
        temperature = _number(temperature, "temperature", _where(path, ""))
        try:
            air_speed(temperature)
        except SettingsError as exc:
            raise SettingsError(f"{_where(path, '')}: {exc}") from None
    default = RegionSpec()
    if "default" in data:
        default = _region("", data["default"], _where(path, "default"))
        if default.role != "fluid":
            raise SettingsError(f"{_where(path, 'default')}: the default entry cannot be a layer")
    regions = data.get("region", {})
    if not isinstance(regions, dict):
        raise SettingsError(f"{_where(path, '')}: write regions as [region.NAME] tables")
    specs = tuple(_region(str(k), v, _where(path, f"region.{k}")) for k, v in regions.items())
    checks = data.get("checks", {})
    if not isinstance(checks, dict):
        raise SettingsError(f"{_where(path, 'checks')}: expected a table")
    known = set(Checks.__dataclass_fields__)
    bad = sorted(set(checks) - known)
    if bad:
        raise SettingsError(f"{_where(path, 'checks')}: unknown key '{bad[0]}' (known: "
                            f"{', '.join(sorted(known))})")
    try:
        chk = Checks(**{k: (int(_number(v, k, _where(path, 'checks')))
                            if k in ("layer_min_cells", "max_listed")
                            else _number(v, k, _where(path, "checks"))) for k, v in checks.items()})
    except SettingsError as exc:
        msg = str(exc)
        raise SettingsError(msg if msg.startswith(path or "job") else
                            f"{_where(path, 'checks')}: {msg}") from None
    return Job(path, temperature, default, specs, chk)


def load_job(path: str | Path) -> Job:
    """Read and validate a TOML job file; raises SettingsError with a one-line message."""
    try:  # imported here: 4 ms of every command's start otherwise (Python >= 3.11)
        import tomllib as _toml
    except ModuleNotFoundError:  # pragma: no cover - Python 3.10
        import tomli as _toml

    p = Path(path)
    try:
        raw = p.read_bytes()
    except OSError as exc:
        raise SettingsError(f"{p}: cannot read the job file ({exc.strerror or exc})") from None
    try:
        data = _toml.loads(raw.decode("utf-8"))
    except UnicodeDecodeError:
        raise SettingsError(f"{p}: the job file is not UTF-8 text") from None
    except _toml.TOMLDecodeError as exc:
        raise SettingsError(f"{p}: not a valid TOML job file: {str(exc).splitlines()[0]}") from None
    return parse_job(data, str(p))


# ---------------------------------------------------------------- resolution
@dataclass(frozen=True)
class RegionMedium:
    """The resolved medium of one region (SI).

    tag, name : the region.  speed : complex m/s (real for a lossless fluid).
    effective_speed : phase speed 1/Re(1/speed), m/s (what resolution is judged with).
    density : kg/m^3.  attenuation_db : amplitude decay per wavelength, dB.
    flow : (3,) m/s.  mach : (3,) Mach vector flow / effective_speed.
    role : "fluid", "absorbing_layer" or "pml".  surrounds : tag of the region a layer
    wraps, or None.  source : where the speed and density come from.
    """

    tag: int
    name: str
    speed: complex
    effective_speed: float
    density: float | None
    attenuation_db: float
    flow: tuple[float, float, float]
    mach: tuple[float, float, float]
    role: str
    surrounds: int | None
    source: str

    @property
    def mach_number(self) -> float:
        return float(np.linalg.norm(self.mach))

    @property
    def is_layer(self) -> bool:
        return self.role in LAYER_ROLES

    @property
    def lossy(self) -> bool:
        return self.speed.imag != 0


@dataclass(frozen=True)
class Media:
    """Media of every region and their per-cell arrays.

    regions : tag -> :class:`RegionMedium`.  cell_speed : (n_cells,) effective speed,
    m/s.  cell_mach : (n_cells, 3) Mach vectors.  job : the job it came from, or None.
    """

    regions: dict[int, RegionMedium]
    cell_speed: np.ndarray
    cell_mach: np.ndarray
    job: Job | None = None

    @property
    def has_flow(self) -> bool:
        return bool(np.any(self.cell_mach))

    @property
    def checks(self) -> Checks:
        return self.job.checks if self.job is not None else Checks()

    def layers(self) -> list[RegionMedium]:
        return [r for r in self.regions.values() if r.is_layer]


def _tag_of(mesh: Mesh, key, tags: set[int], where: str) -> int:
    by_name = {v.lower(): k for k, v in mesh.region_names.items()}
    tag = key
    if isinstance(key, str):
        k = key.strip()
        tag = int(k) if k.lstrip("-").isdigit() else by_name.get(k.lower())
    if tag is None or tag not in tags:
        known = ", ".join(sorted(f"{t} ({mesh.region_name(t)})" for t in tags))
        mesh_name = f" {Path(mesh.source).name}" if mesh.source else ""
        raise SettingsError(f"{where}: no region '{key}' in the mesh{mesh_name}; "
                            f"regions: {known}")
    return int(tag)


def _medium(spec: RegionSpec, default_t: float) -> tuple[complex, float | None, str]:
    medium = spec.medium or ("custom" if spec.speed is not None else "air")
    if medium == "air":
        t = spec.temperature if spec.temperature is not None else default_t
        c, rho = complex(air_speed(t)), air_density(t)
        src = f"air at {t:g} deg C (ideal gas)"
    elif medium == "water":
        c, rho = complex(WATER_SPEED), WATER_DENSITY
        src = "water at 20 deg C"
    else:
        c, rho, src = spec.speed, None, "job file"
    if spec.speed is not None and medium != "custom":
        c, src = spec.speed, f"{src}; speed from the job file"
    if spec.density is not None:
        rho = spec.density
    if spec.loss_factor is not None:
        c = loss_speed(c.real, spec.loss_factor)
        src += f"; loss factor {spec.loss_factor:g}"
    return c, rho, src


#: speeds of sound (m/s) that a mesh file's material cards may state for use in the advice;
#: outside this range the card is most likely in other units than the mesh (e.g. mm/s in a
#: deck read in metres) and it is reported but not used (common practice, no source: the
#: range spans light gases to dense liquids and equivalent fluids)
PLAUSIBLE_SPEED = (10.0, 20000.0)


def file_speed_used(mesh: Mesh, tag: int, job: Job | None = None) -> bool:
    """True when the mesh file's stated speed of region ``tag`` sets its medium: it is
    plausible and the job file gives no entry of its own for the region."""
    stated = mesh.material_speeds.get(tag)
    if stated is None or not PLAUSIBLE_SPEED[0] <= stated[0] <= PLAUSIBLE_SPEED[1]:
        return False
    if job is not None:
        tags = set(mesh.region_tags.tolist())
        for r in job.regions:
            if _tag_of(mesh, r.key, tags, "job") == tag:
                return False
    return True


def resolve_media(mesh: Mesh, job: Job | None = None, temperature: float = 20.0,
                  speed: float | None = None, region_speeds: Mapping | None = None) -> Media:
    """Media of every region of ``mesh`` from a job and the overrides.

    Precedence (lowest first): air at ``temperature`` deg C, the job's default entry
    and top-level temperature, the speed the mesh file's material cards state for a
    region (``mesh.material_speeds``, when within :data:`PLAUSIBLE_SPEED`), the job's
    region entries, ``speed`` (every region), ``region_speeds`` (tag or name -> m/s).  Raises SettingsError for an unknown
    region, a non-positive speed or a Mach number >= 1.
    """
    job = job if job is not None else Job()
    region_speeds = dict(region_speeds or {})
    tags = set(mesh.region_tags.tolist()) if mesh.n_cells else set()
    default_t = job.temperature if job.temperature is not None else temperature
    src_path = job.path or "job"
    specs: dict[int, RegionSpec] = {}
    seen: dict[int, str] = {}
    for r in job.regions:
        where = f"{src_path}: [region.{r.key}]"
        tag = _tag_of(mesh, r.key, tags, where)
        if tag in seen:
            raise SettingsError(f"{where}: region {tag} is already given as '{seen[tag]}'")
        seen[tag] = r.key
        specs[tag] = r
    overrides = {}
    for key, value in region_speeds.items():
        tag = _tag_of(mesh, key, tags, "--region-speed")
        if not float(value) > 0:
            raise SettingsError(f"sound speed {value} m/s of region {key} must be positive")
        overrides[tag] = float(value)
    if speed is not None and not speed > 0:
        raise SettingsError(f"sound speed {speed} m/s must be positive")
    regions: dict[int, RegionMedium] = {}
    for tag in sorted(tags):
        spec = specs.get(tag, job.default)
        c, rho, src = _medium(spec, default_t)
        if tag not in specs and file_speed_used(mesh, tag):
            cs_file, card = mesh.material_speeds[tag]
            c, rho, src = complex(cs_file), None, f"{card} in the mesh file"
        override = overrides.get(tag, speed)
        if override is not None:
            c, src = complex(override), "command line"
        ceff = float(effective_speed(c))
        flow = tuple(float(v) for v in (spec.flow or (0.0, 0.0, 0.0)))
        mach = tuple(v / ceff for v in flow)
        M = float(np.linalg.norm(mach))
        name = mesh.region_name(tag)
        if M >= 1.0:
            where = f"{src_path}: [region.{spec.key}]" if spec.key else f"region {name}"
            raise SettingsError(f"{where}: mean flow {np.linalg.norm(flow):g} m/s at "
                                f"{ceff:.1f} m/s is Mach {M:.3g} >= 1; only subsonic flow "
                                "is supported")
        surrounds = None
        if spec.surrounds is not None:
            surrounds = _tag_of(mesh, spec.surrounds, tags,
                                f"{src_path}: [region.{spec.key}] surrounds")
            if surrounds == tag:
                raise SettingsError(f"{src_path}: [region.{spec.key}]: a layer cannot surround "
                                    "itself")
        regions[tag] = RegionMedium(tag, name, c, ceff, rho,
                                    float(attenuation_per_wavelength(c)), flow, mach, spec.role,
                                    surrounds, src)
    flowing = any(any(r.mach) for r in regions.values())
    speeds = {r.effective_speed for r in regions.values()}
    one = len(speeds) == 1 and set(regions) >= set(mesh.region_tags.tolist())
    # one speed everywhere, or no flow: read-only broadcasts (no (n_cells,) arrays held)
    cs = (np.broadcast_to(np.array(float(speeds.pop())), (mesh.n_cells,)) if one else
          np.empty(mesh.n_cells))
    cm = np.zeros((mesh.n_cells, 3)) if flowing else np.broadcast_to(np.zeros(3),
                                                                      (mesh.n_cells, 3))
    if not one or flowing:
        for tag, r in regions.items():
            sel = mesh.region == tag
            if not one:
                cs[sel] = r.effective_speed
            if any(r.mach):
                cm[sel] = r.mach
    return Media(regions, cs, cm, job)
