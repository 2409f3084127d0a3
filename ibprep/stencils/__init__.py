"""Interface stencils: the surface index and closest points, the compiled pass, and the WLS fit (``build``)."""

__all__: list[str] = []
