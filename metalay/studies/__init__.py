"""metalay.studies."""

__all__: list[str] = []
