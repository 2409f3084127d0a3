"""Tagging cell centres solid, fluid or interface for surfaces in world coordinates.

Tag codes are the :class:`CellTag` members, stored in ``uint8`` arrays of
``grid.shape``.
"""

from __future__ import annotations

from enum import IntEnum

__all__ = ["CellTag"]


class CellTag(IntEnum):
    """Tag code of a cell, stored as ``uint8``.

    FLUID = 0, SOLID = 1, INTERFACE = 2. By default interface cells are
    fluid-side: fluid cells with at least one face neighbour that is solid.
    """

    FLUID = 0
    SOLID = 1
    INTERFACE = 2
