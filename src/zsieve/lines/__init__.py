"""Rest-frame line lists (vacuum Angstrom) and air <-> vacuum conversion."""

from .medium import air_to_vacuum, refractive_index_air, vacuum_to_air

__all__ = ["air_to_vacuum", "vacuum_to_air", "refractive_index_air"]
