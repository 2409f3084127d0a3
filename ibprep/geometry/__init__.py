"""Body geometry: NACA 4-digit sections, finite-span wings, watertight surfaces."""

__all__: list[str] = []
