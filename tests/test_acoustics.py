"""Sound speed and sweep frequencies against textbook values and the standards."""
import numpy as np
import pytest

from meshcheck.acoustics import air_speed, band_centres, band_edges, linear_range, \
    nominal_frequency
from meshcheck.errors import SettingsError


def test_air_speed_textbook():
    # Kinsler et al., Fundamentals of Acoustics (4th ed.), eq. 5.6.8: 343.2 m/s at 20 C
    assert air_speed(20.0) == pytest.approx(343.2, abs=0.05)
    assert air_speed(0.0) == pytest.approx(331.3)


def test_third_octave_nominal_iso266():
    # ISO 266:1997 preferred frequencies, 100 Hz .. 1 kHz
    nominal = [100, 125, 160, 200, 250, 315, 400, 500, 630, 800, 1000]
    assert nominal_frequency(band_centres(100, 1000)).tolist() == nominal


def test_band_centres_base_ten_iec61260():
    # IEC 61260-1:2014: f_m = 1000 * 10^(3x/10 / 3); 1 kHz exact, G^(1/3) ratio between bands
    c = band_centres(20, 20000)
    assert len(c) == 31
    assert np.allclose(c[1:] / c[:-1], 10 ** 0.1)
    assert 1000.0 in c
    lo, hi = band_edges(np.array([1000.0]))
    assert lo[0] == pytest.approx(1000 / 10 ** 0.05) and hi[0] == pytest.approx(1000 * 10 ** 0.05)


def test_octave_bands():
    assert nominal_frequency(band_centres(31.5, 8000, 1)).tolist() == \
        [31.5, 63, 125, 250, 500, 1000, 2000, 4000, 8000]


def test_linear_range_includes_end():
    assert linear_range(50, 1000, 10)[[0, -1]].tolist() == [50, 1000]
    assert len(linear_range(50, 1000, 10)) == 96
    assert linear_range(100, 105, 2).tolist() == [100, 102, 104, 105]
    with pytest.raises(SettingsError):
        linear_range(100, 50, 1)
