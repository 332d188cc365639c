"""Suite-wide settings: no network for astropy, a non-interactive matplotlib backend."""

import os

os.environ.setdefault("MPLBACKEND", "Agg")

import pytest  # noqa: E402
from astropy.utils import iers  # noqa: E402
from astropy.utils.data import conf as data_conf  # noqa: E402


@pytest.fixture(autouse=True, scope="session")
def _astropy_offline():
    """zsieve must work offline: astropy may not download IERS tables or site lists."""
    with data_conf.set_temp("allow_internet", False), iers.conf.set_temp("auto_download", False):
        yield
