"""Cell tagging: exact solid / fluid / interface tags per step, and the fresh and covered cells between steps."""

__all__: list[str] = []
