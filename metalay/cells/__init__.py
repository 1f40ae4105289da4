"""metalay.cells."""

__all__: list[str] = []
