"""wxshock: community weather-shock indicators from a daily weather grid."""

__version__ = "0.1.0"
