"""Files in and out: the case file, the exports and reports, and the demo case."""

__all__: list[str] = []
