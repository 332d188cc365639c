"""Exceptions raised by zsieve.

Every error about an input file carries the file name and one sentence saying what is
wrong, so a batch can record it in a summary row and move on.
"""

from __future__ import annotations

__all__ = ["ZsieveError", "SpectrumFileError", "LimitExceededError", "FitError"]


class ZsieveError(Exception):
    """Base class of all zsieve errors."""


class SpectrumFileError(ZsieveError):
    """A file could not be turned into a usable spectrum.

    Parameters
    ----------
    path : str or os.PathLike
        The offending file.
    problem : str
        One sentence, no traceback: what is wrong with it.

    Examples
    --------
    >>> err = SpectrumFileError("night3/obj.fits", "wavelengths are not monotonic")
    >>> str(err)
    'night3/obj.fits: wavelengths are not monotonic'
    """

    def __init__(self, path, problem: str):
        self.path = str(path)
        self.problem = str(problem)
        super().__init__(f"{self.path}: {self.problem}")


class LimitExceededError(SpectrumFileError):
    """A file declares a size beyond zsieve's documented limits (refused before allocating)."""


class FitError(ZsieveError):
    """The measurement could not run on an otherwise readable spectrum."""
