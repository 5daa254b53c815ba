"""Sound speed of the media and the frequencies of a sweep.

* Speed of sound in dry air as an ideal gas: c = 331.3 sqrt(1 + T/273.15) m/s
  (T in deg C; 343.2 m/s at 20 deg C), e.g. Kinsler, Frey, Coppens & Sanders,
  "Fundamentals of Acoustics", 4th ed., Wiley 2000, eq. (5.6.8).
* Water: about 1481 m/s at 20 deg C (fresh water; same textbook, Table A10).
* One-third-octave and octave bands: exact mid-band frequencies with the
  base-ten ratio G = 10^(3/10) of IEC 61260-1:2014, f_m = 1000 G^(x/3) Hz,
  labelled with the preferred (nominal) frequencies of ISO 266:1997 (R10 series).
"""
from __future__ import annotations

import numpy as np

from .errors import SettingsError

__all__ = ["air_speed", "WATER_SPEED", "band_centres", "linear_range", "nominal_frequency",
           "band_edges"]

WATER_SPEED = 1481.0
#: ISO 266 R10 preferred numbers (one decade), used as nominal band labels
_R10 = np.array([1.0, 1.25, 1.6, 2.0, 2.5, 3.15, 4.0, 5.0, 6.3, 8.0])


def air_speed(temperature_c: float = 20.0) -> float:
    """Speed of sound in dry air, m/s, ideal gas, temperature in deg C."""
    if temperature_c <= -273.15:
        raise SettingsError(f"air temperature {temperature_c} deg C is below absolute zero")
    return 331.3 * float(np.sqrt(1.0 + temperature_c / 273.15))


def nominal_frequency(exact: np.ndarray) -> np.ndarray:
    """ISO 266 preferred (nominal) value of exact one-third-octave mid-band frequencies."""
    exact = np.asarray(exact, dtype=float)
    decade = np.floor(np.log10(exact) + 1e-9)
    mant = exact / 10.0 ** decade
    idx = np.argmin(np.abs(np.log(mant[:, None] / _R10[None, :])), axis=1)
    return _R10[idx] * 10.0 ** decade


def band_centres(fmin: float, fmax: float, fraction: int = 3) -> np.ndarray:
    """Exact mid-band frequencies (Hz) of the 1/fraction-octave bands whose nominal
    (ISO 266) frequency lies in [fmin, fmax] (fraction 1 = octave, 3 = one-third
    octave), IEC 61260-1.  A band is in when its centre is within half a
    one-third-octave step of the range, so 20..20000 gives the 31 audio bands."""
    if fraction not in (1, 3):
        raise SettingsError("band fraction must be 1 (octave) or 3 (one-third octave)")
    if not 0 < fmin <= fmax:
        raise SettingsError(f"band range {fmin}..{fmax} Hz is empty or not positive")
    G = 10.0 ** 0.3
    step = 3 // fraction
    lo = int(np.ceil(3 * np.log(fmin / 1000.0) / np.log(G) - 0.5))
    hi = int(np.floor(3 * np.log(fmax / 1000.0) / np.log(G) + 0.5))
    x = np.arange(lo, hi + 1)
    x = x[x % step == 0]
    return 1000.0 * G ** (x / 3.0)


def band_edges(centres: np.ndarray, fraction: int = 3) -> tuple[np.ndarray, np.ndarray]:
    """Lower and upper band-edge frequencies of mid-band frequencies, IEC 61260-1."""
    G = 10.0 ** 0.3
    r = G ** (1.0 / (2 * fraction))
    c = np.asarray(centres, dtype=float)
    return c / r, c * r


def linear_range(fmin: float, fmax: float, step: float) -> np.ndarray:
    """fmin, fmin + step, ... up to and including fmax (Hz)."""
    if not (0 < fmin <= fmax) or step <= 0:
        raise SettingsError(f"frequency range {fmin}..{fmax} Hz with step {step} is invalid; "
                            "use 0 < fmin <= fmax and step > 0")
    n = int(np.floor((fmax - fmin) / step + 1e-9)) + 1
    f = fmin + step * np.arange(n)
    if f[-1] < fmax * (1 - 1e-12):
        f = np.append(f, fmax)
    return f
