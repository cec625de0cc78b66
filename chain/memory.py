"""Refuse work that would need more memory than the machine has, before allocating."""
from __future__ import annotations

from .errors import CapTooLargeError


def available_bytes() -> int:
    """Memory this process can still use, in bytes (psutil's available memory: free plus
    reclaimable caches; the one measure every memory check in tallyfit uses)."""
    import psutil

    return int(psutil.virtual_memory().available)


def require_memory(needed_bytes: int, *, what: str, cap: int, share: float = 0.5) -> None:
    """Raise CapTooLargeError if ``needed_bytes`` exceeds ``share`` of the available memory.

    Args:
        needed_bytes: bytes the operation will allocate.
        what: a short description of the operation, for the message.
        cap: the size cap N, for the message.
        share: the fraction of available memory one operation may take.

    Raises:
        CapTooLargeError: with the needed and available sizes.
    """
    avail = available_bytes()
    if needed_bytes > share * avail:
        raise CapTooLargeError(
            f"{what} with size cap N={cap} needs about {needed_bytes / 1024**3:.1f} GiB, "
            f"but only {avail / 1024**3:.1f} GiB is available; lower the cap or ask for "
            f"rows for a few start sizes instead of the whole matrix",
            cap=cap, needed_bytes=int(needed_bytes), available_bytes=int(avail))
