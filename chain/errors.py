"""Errors raised by the chain solvers. All are ValueErrors, so callers can catch either."""
from __future__ import annotations


class ChainError(ValueError):
    """Base class for bad arguments to a chain solver."""


class RateError(ChainError):
    """A rate or step probability is negative, NaN, infinite or inconsistent.

    Attributes:
        name: which rate ("birth", "death", "p", "q").
        size: the first offending size, or None.
        value: the offending value, or None.
    """

    def __init__(self, message: str, *, name: str | None = None, size: int | None = None,
                 value: float | None = None) -> None:
        self.name = name
        self.size = size
        self.value = value
        super().__init__(message)


class CapTooLargeError(ChainError):
    """The size cap would need more memory than this machine has.

    Attributes:
        cap: the requested cap N.
        needed_bytes: memory the operation would need.
        available_bytes: memory available.
    """

    def __init__(self, message: str, *, cap: int, needed_bytes: int, available_bytes: int) -> None:
        self.cap = cap
        self.needed_bytes = needed_bytes
        self.available_bytes = available_bytes
        super().__init__(message)
