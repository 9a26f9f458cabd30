"""benchctl: bench automation and measurement logging for switching power converters."""

__version__ = "0.1.0"
