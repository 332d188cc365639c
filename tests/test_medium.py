"""Air <-> vacuum conversion against NIST values (from memory) and a round trip."""

from __future__ import annotations

import numpy as np
import pytest

from zsieve.lines import air_to_vacuum, vacuum_to_air


@pytest.mark.parametrize(
    "air, vac",
    [  # NIST ASD air and vacuum wavelengths (from memory)
        (6562.80, 6564.61),  # H-alpha
        (5006.84, 5008.24),  # [O III]
        (4861.33, 4862.68),  # H-beta
        (4340.47, 4341.69),  # H-gamma
        (6583.45, 6585.27),  # [N II]
        (5577.34, 5578.89),  # [O I] night sky
        (8542.09, 8544.44),  # Ca II triplet
    ],
)
def test_against_nist(air, vac):
    assert abs(float(air_to_vacuum(air)) - vac) < 0.02
    assert abs(float(vacuum_to_air(vac)) - air) < 0.02


def test_round_trip():
    w = np.linspace(2000.0, 11000.0, 20001)
    assert np.max(np.abs(air_to_vacuum(vacuum_to_air(w)) - w)) < 1e-4
    assert np.max(np.abs(vacuum_to_air(air_to_vacuum(w)) - w)) < 1e-4


def test_ultraviolet_unchanged_and_monotonic():
    # Below 2000 A wavelengths are vacuum by convention (common practice).
    assert float(air_to_vacuum(1215.67)) == 1215.67
    w = np.linspace(2000.0, 11000.0, 5000)
    assert np.all(np.diff(air_to_vacuum(w)) > 0)
    # the air-vacuum difference grows from ~1.4 A at 5000 A to ~2.7 A at 1 micron (common practice)
    d = air_to_vacuum(np.array([5000.0, 10000.0])) - [5000.0, 10000.0]
    assert 1.3 < d[0] < 1.5 and 2.6 < d[1] < 2.9
