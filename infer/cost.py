"""The memory and time a fit will need, estimated before it starts.

A sampling process holds a handful of arrays over the sizes 0..N and their gradients:
measured, about BYTES_PER_SIZE bytes per size on top of PROCESS_BYTES. :func:`estimate_memory`
multiplies by the processes that hold the model at once; :func:`require_memory_for_fit`
refuses when that exceeds MEMORY_SHARE of the available memory. :func:`estimate_sampling_time`
scales one timed evaluation of the log density and its gradient by the number NUTS needs.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from tallyfit.infer.errors import InputError

__all__ = ["BYTES_PER_SIZE", "PROCESS_BYTES", "MEMORY_SHARE", "LEAPFROG_STEPS", "FitTooLargeError", "FitCost",
           "estimate_memory", "require_memory_for_fit", "estimate_sampling_time", "describe_duration"]

#: Bytes per size 0..N one sampling process needs (measured: 180 at N = 4·10⁶, linear family,
#: model built and one log density + gradient evaluated; rounded up).
BYTES_PER_SIZE = 200
#: A sampling process with PyMC and PyTensor loaded and a small model compiled (measured 545 MB).
PROCESS_BYTES = 600 * 2 ** 20
#: The share of the available memory a fit may plan to use.
MEMORY_SHARE = 0.8
#: Log-density-and-gradient evaluations per NUTS iteration: low, typical and high (tree depth 3
#: to 5 — common practice; the single-site logistic demo measured 8.6 over warm-up and draws).
LEAPFROG_STEPS = (7, 15, 31)


class FitTooLargeError(InputError):
    """A fit that would need more memory than the machine has.

    Attributes:
        needed_bytes: the estimate; available_bytes: what the machine has free now.
        cap: the size cap N.
        (and source, hint from InputError)
    """

    def __init__(self, message: str, *, needed_bytes: int, available_bytes: int, cap: int, **kw: Any) -> None:
        super().__init__(message, **kw)
        self.needed_bytes = int(needed_bytes)
        self.available_bytes = int(available_bytes)
        self.cap = int(cap)


@dataclass(frozen=True)
class FitCost:
    """What a fit will need, estimated before it starts.

    Attributes:
        cap: the size cap N.
        processes: processes that hold the model at once (the sampling chains, and the main
            process when they run in processes of their own).
        bytes_per_process: memory of one of them.
        needed_bytes: all of them together.
        available_bytes: memory free now.
    """

    cap: int
    processes: int
    bytes_per_process: int
    needed_bytes: int
    available_bytes: int

    @property
    def fits(self) -> bool:
        """True when the estimate is within MEMORY_SHARE of the available memory."""
        return self.needed_bytes <= MEMORY_SHARE * self.available_bytes

    def describe(self) -> str:
        """Plain words: how much memory, of how much."""
        return (f"about {_gib(self.needed_bytes)} of memory ({self.processes} process(es) of "
                f"{_gib(self.bytes_per_process)} for sizes 0..{self.cap}; {_gib(self.available_bytes)} is free)")


def _gib(n: float) -> str:
    return f"{n / 2 ** 30:.1f} GiB" if n >= 2 ** 30 else f"{n / 2 ** 20:.0f} MiB"


def estimate_memory(cap: int, *, processes: int, available: int | None = None) -> FitCost:
    """The memory sampling will need with size cap N and ``processes`` processes holding the model.

    Args:
        cap: the size cap N (≥ 1).
        processes: processes holding the model at once (see :class:`FitCost`).
        available: free memory in bytes (default: measured now, ``chain.memory.available_bytes``).

    Returns:
        FitCost.
    """
    from tallyfit.chain.memory import available_bytes

    per = PROCESS_BYTES + BYTES_PER_SIZE * (int(cap) + 1)
    avail = available_bytes() if available is None else int(available)
    return FitCost(cap=int(cap), processes=int(processes), bytes_per_process=int(per),
                   needed_bytes=int(per * processes), available_bytes=avail)


def require_memory_for_fit(cost: FitCost, *, largest_count: int, where: str | None = None,
                           cap_given: bool = False) -> None:
    """Refuse a fit whose memory estimate does not fit the machine.

    Args:
        cost: from :func:`estimate_memory`.
        largest_count: the largest count, for the message.
        where: the file and line of the largest count, for the message.
        cap_given: True when the user set the cap (--max-size).

    Raises:
        FitTooLargeError: naming the need, what is free, and the setting to change.
    """
    if cost.fits:
        return
    why = (f"the size cap you set (--max-size {cost.cap})" if cap_given else
           f"the size cap {cost.cap}, chosen from the largest count {largest_count}"
           + (f" ({where})" if where else ""))
    # one chain in the main process is the least a fit can use
    fewer = int(MEMORY_SHARE * cost.available_bytes // max(cost.bytes_per_process, 1))
    hint = ("lower --max-size ([fit] max_size)" if cap_given else
            "check that count (a typing slip?), or set a lower --max-size if the count is right") + (
        f", or run fewer chains at once (--chains {max(1, fewer - 1)})" if 1 <= fewer < cost.processes else "")
    raise FitTooLargeError(f"this fit would need {cost.describe()}: more than this machine can give, because "
                           f"of {why}; nothing was written", needed_bytes=cost.needed_bytes,
                           available_bytes=cost.available_bytes, cap=cost.cap, source="--max-size", hint=hint)


def estimate_sampling_time(seconds_per_evaluation: float, *, chains: int, draws: int, tune: int,
                           processes: int) -> tuple[float, float, float]:
    """Seconds NUTS will take: low, typical and high.

    Args:
        seconds_per_evaluation: one log density + gradient evaluation, timed at the start.
        chains, draws, tune: the sampler's settings.
        processes: chains run at once.

    Returns:
        (low, typical, high) seconds, from LEAPFROG_STEPS evaluations per iteration.
    """
    rounds = math.ceil(chains / max(1, processes))
    iterations = rounds * (draws + tune)
    low, mid, high = (float(seconds_per_evaluation) * k * iterations for k in LEAPFROG_STEPS)
    return low, mid, high


def describe_duration(seconds: float) -> str:
    """Seconds in plain words: "40 seconds", "12 minutes", "3.5 hours"."""
    if seconds < 90:
        return f"{seconds:.0f} seconds"
    if seconds < 90 * 60:
        return f"{seconds / 60:.0f} minutes"
    return f"{seconds / 3600:.1f} hours"
