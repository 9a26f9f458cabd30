"""Errors raised by the converter model.

The simulator never imports ``benchctl``; it has its own small tree::

    ConverterModelError            base of everything raised here
    ├── DesignError                a design's values are inconsistent (also ValueError)
    ├── SettingError               a source/load/fault setting is invalid (also ValueError)
    └── NotRegulatingError         asked for a small-signal loop while the loop is not closed
"""

from __future__ import annotations


class ConverterModelError(Exception):
    """Base class of all converter-model errors."""


class DesignError(ConverterModelError, ValueError):
    """A converter design holds values that cannot work together."""


class SettingError(ConverterModelError, ValueError):
    """A source, load or fault setting is outside what the model accepts."""


class NotRegulatingError(ConverterModelError):
    """The converter is not regulating, so it has no small-signal loop gain."""
