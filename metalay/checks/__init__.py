"""metalay.checks."""

__all__: list[str] = []
