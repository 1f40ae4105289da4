"""metalay.util."""

__all__: list[str] = []
