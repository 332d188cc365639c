"""Suite-wide settings: no network for astropy (here and in child processes), a non-interactive
matplotlib backend."""

import os
import pathlib
import tempfile

os.environ.setdefault("MPLBACKEND", "Agg")

# Child processes (the CLI runs in subprocesses) read astropy's configuration from
# XDG_CONFIG_HOME: give them one that forbids downloads, before astropy is imported here.
_cfg = pathlib.Path(tempfile.mkdtemp(prefix="zsieve-astropy-cfg-"))
(_cfg / "astropy").mkdir()
(_cfg / "astropy" / "astropy.cfg").write_text(
    "[utils.data]\nallow_internet = False\n[utils.iers.iers]\nauto_download = False\n"
)
os.environ["XDG_CONFIG_HOME"] = str(_cfg)

import pytest  # noqa: E402
from astropy.utils import iers  # noqa: E402
from astropy.utils.data import conf as data_conf  # noqa: E402


@pytest.fixture(autouse=True, scope="session")
def _astropy_offline():
    """zsieve must work offline: astropy may not download IERS tables or site lists."""
    with data_conf.set_temp("allow_internet", False), iers.conf.set_temp("auto_download", False):
        yield
