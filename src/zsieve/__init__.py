"""zsieve: redshifts of 1-D astronomical spectra, with honest uncertainties and grades,
and what each redshift means physically in a chosen cosmology.

Wavelengths are vacuum Angstrom everywhere inside zsieve.
"""

from importlib.metadata import PackageNotFoundError, version as _version

try:
    __version__ = _version("zsieve")
except PackageNotFoundError:  # running from a source tree without install
    __version__ = "0.0.0+unknown"

from .errors import FitError, LimitExceededError, SpectrumFileError, ZsieveError
from .result import Candidate, FitResult, LineMatch
from .spectrum import Spectrum, SpectrumMeta

__all__ = [
    "__version__",
    "Spectrum",
    "SpectrumMeta",
    "FitResult",
    "Candidate",
    "LineMatch",
    "ZsieveError",
    "SpectrumFileError",
    "LimitExceededError",
    "FitError",
    "measure",
]


def __getattr__(name):
    # zsieve.measure(path_or_spectrum, **options): loaded on first use so `import zsieve` stays light
    if name == "measure":
        from .engine.measure import measure_any

        return measure_any
    raise AttributeError(f"module 'zsieve' has no attribute {name!r}")
