"""Case-level work: swept envelope and box sizing, step sweeps, and the pre-flight checks."""

__all__: list[str] = []
