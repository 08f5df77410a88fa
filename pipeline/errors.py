"""Project exceptions: one base class so the CLI can turn any of them into a clean message."""

from __future__ import annotations

__all__ = [
    "ConfigError",
    "InputError",
    "IsogapError",
    "MissingAttributeError",
    "NonFiniteDataError",
    "ProcessingError",
    "ShapeError",
    "SignError",
    "StoreError",
    "StoreLockedError",
    "UnitsError",
    "UnreadableFileError",
]


class IsogapError(ValueError):
    """Base class of every error the project raises on purpose."""


class InputError(IsogapError):
    """A raw input file breaks the input contract (DESIGN.md §3)."""


class UnreadableFileError(InputError):
    """The file is truncated, not of its claimed format, or a sidecar lacks its array file."""


class MissingAttributeError(InputError):
    """A required attribute or variable is missing."""


class ShapeError(InputError):
    """An array has the wrong number of dimensions or mismatching shapes."""


class UnitsError(InputError):
    """A variable's units are missing or not among the allowed ones."""


class NonFiniteDataError(InputError):
    """A channel is mostly (or entirely) NaN/Inf, or all zero."""


class SignError(InputError):
    """The current's sign contradicts the bias polarity throughout."""


class ConfigError(IsogapError):
    """The configuration file is malformed, has unknown keys or out-of-range values."""


class ProcessingError(IsogapError):
    """A stage cannot produce a meaningful result for this input."""


class StoreError(IsogapError):
    """The output store cannot be written or read as the store contract requires."""


class StoreLockedError(StoreError):
    """Another process holds the store's write lock."""
