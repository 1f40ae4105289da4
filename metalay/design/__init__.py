"""metalay.design."""

__all__: list[str] = []
