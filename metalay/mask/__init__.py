"""metalay.mask."""

__all__: list[str] = []
