"""Rest-frame line lists (vacuum Angstrom) and air <-> vacuum conversion."""

from .catalog import (
    BUNDLED_LISTS,
    CLASS_COLUMNS,
    LINE_COLUMNS,
    LineListError,
    bundled_path,
    load_linelist,
    sky_features,
)
from .medium import air_to_vacuum, refractive_index_air, vacuum_to_air

__all__ = [
    "air_to_vacuum",
    "vacuum_to_air",
    "refractive_index_air",
    "load_linelist",
    "sky_features",
    "bundled_path",
    "LineListError",
    "BUNDLED_LISTS",
    "CLASS_COLUMNS",
    "LINE_COLUMNS",
]
