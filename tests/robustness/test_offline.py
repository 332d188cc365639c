"""zsieve works with no network: fit, distances and frames with astropy downloads disabled.

Two proofs, both with every socket connection made to fail loudly (so an attempted download
cannot pass unnoticed as a silent fallback):

* in this process, with ``astropy.utils.data.conf.allow_internet = False`` and
  ``astropy.utils.iers.conf.auto_download = False`` (as tests/conftest.py sets for the suite):
  ``measure`` on a mock spectrum, ``describe`` with bootstrap samples, ``frame_info`` with a
  site, a time and sky coordinates (a real barycentric correction: astropy's
  ``SkyCoord.radial_velocity_correction`` needs Earth orientation, which must come from the
  bundled tables), and ``zsieve distances``;
* in a fresh interpreter, where the suite's conftest does not reach: ``zsieve fit`` on a FITS
  file whose header carries RA/Dec, MJD-OBS and the site, checked through its JSON record.
"""

from __future__ import annotations

import json
import socket
import subprocess
import sys

import numpy as np
import pytest

from helpers import limit_memory, subprocess_env

#: Mount Perrault Observatory of the demo scenario (invented site, plausible coordinates).
SITE = dict(site_lon_deg=-111.6, site_lat_deg=31.96, site_height_m=2100.0)
TARGET = dict(ra_deg=150.1, dec_deg=2.2, mjd=60210.3)


@pytest.fixture
def no_sockets(monkeypatch):
    """Every attempt to open a network connection raises and is recorded."""
    attempts = []

    def refuse(self, address, *a, **k):
        attempts.append(address)
        raise OSError("network disabled by test_offline")

    monkeypatch.setattr(socket.socket, "connect", refuse)
    monkeypatch.setattr(socket.socket, "connect_ex", refuse)
    monkeypatch.setattr(socket, "create_connection",
                        lambda address, *a, **k: refuse(None, address))
    return attempts


def _offline():
    from astropy.utils import iers
    from astropy.utils.data import conf as data_conf

    return data_conf.set_temp("allow_internet", False), iers.conf.set_temp("auto_download", False)


def _mock(seed=4):
    from zsieve.simulate import mock_spectrum
    from zsieve.spectrum import SpectrumMeta

    meta = SpectrumMeta(object_name="CDX-0042", frame="topocentric", **TARGET, **SITE)
    spec, truth = mock_spectrum("emission-galaxy", 0.35, 20.0, np.random.default_rng(seed),
                                dlog10=2e-4, meta=meta)
    return spec, truth


def test_fit_distances_frames_offline(no_sockets, capsys):
    from zsieve.cli import main
    from zsieve.cosmology import describe
    from zsieve.cosmology.frames import frame_info
    from zsieve.engine.measure import MeasureConfig, measure

    spec, truth = _mock()
    a, b = _offline()
    with a, b:
        res = measure(spec, MeasureConfig(n_resamples=10, seed=1))
        assert res.status == "ok"
        assert abs(res.z - truth["z"]) < 0.002 * (1 + truth["z"])
        d = describe(res.z, z_samples=res.z_samples)
        assert d["luminosity_distance_mpc"] > 0 and d["luminosity_distance_mpc_err"] is not None
        info = frame_info(spec.meta, res.z)
        # a barycentric correction was computed: |v| < 30 km/s (Earth's orbit ~29.8 km/s plus
        # rotation ~0.5 km/s; common practice)
        assert info["correction_applied"] is True, info.get("correction_note")
        assert 0 < abs(info["v_bary_kms"]) < 31.0
        assert main(["distances", "0.5", "--json"]) == 0
    printed = json.loads(capsys.readouterr().out)
    assert printed
    assert no_sockets == [], f"network connections were attempted: {no_sockets}"


_OFFLINE_CLI = r"""
import socket, sys
attempts = []
def refuse(self, address, *a, **k):
    attempts.append(address)
    raise OSError("network disabled by test_offline")
socket.socket.connect = refuse
socket.socket.connect_ex = refuse
socket.create_connection = lambda address, *a, **k: refuse(None, address)
from astropy.utils import iers
from astropy.utils.data import conf
conf.allow_internet = False
iers.conf.auto_download = False
from zsieve.cli import main
code = main(sys.argv[1:])
if attempts:
    print("NETWORK ATTEMPTS", attempts, file=sys.stderr)
    code = 99
sys.exit(code)
"""


def test_cli_fit_offline_in_fresh_interpreter(tmp_path):
    from zsieve.io import write_fits_image

    spec, truth = _mock(seed=8)
    data = tmp_path / "in"
    data.mkdir()
    write_fits_image(spec, data / "cdx-0042.fits", sampling="log")
    out = tmp_path / "out"
    proc = subprocess.run(
        [sys.executable, "-c", _OFFLINE_CLI, "fit", str(data), "--out", str(out), "--resamples", "5",
         "--no-figures", "--jobs", "1", "--no-progress"],
        capture_output=True, text=True, timeout=300, preexec_fn=limit_memory(), env=subprocess_env(),
    )
    assert proc.returncode == 0, proc.stderr[-3000:]
    (record,) = list((out / "objects").glob("*.json"))
    rec = json.loads(record.read_text())
    assert rec["status"] == "ok"
    assert rec["frames"]["correction_applied"] is True, rec["frames"].get("correction_note")
    assert rec["cosmology"]["luminosity_distance_mpc"] > 0


def test_child_processes_are_offline():
    """The subprocesses of these tests (zsieve fit runs) get astropy downloads disabled too."""
    proc = subprocess.run(
        [sys.executable, "-c", "from astropy.utils.data import conf; from astropy.utils import iers; "
                               "print(conf.allow_internet, iers.conf.auto_download)"],
        capture_output=True, text=True, timeout=120, env=subprocess_env())
    assert proc.stdout.split() == ["False", "False"], proc.stderr
