"""metalay.routes."""

__all__: list[str] = []
