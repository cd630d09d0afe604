"""wxshock: community weather-shock indicators from a daily weather grid."""

__version__ = "0.1.0"


def __getattr__(name: str) -> object:
    """``service.Client``, imported on first use so that ``import service`` stays quick."""
    if name == "Client":
        from service.client import Client

        return Client
    raise AttributeError(f"module 'service' has no attribute {name!r}")
