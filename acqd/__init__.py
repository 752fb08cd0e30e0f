"""acqd: automated step tests on the electronics bench.

The data path runs transport (``acqd.visa``) → instrument roles (``acqd.instruments``) →
step test (``acqd.steptest``) → record store (``acqd.store``) → comparator (``acqd.compare``) →
campaign (``acqd.campaign``), with the simulated bench and replay (``acqd.sim``) beside it.
"""

import os

# The matrices here are tiny (2x2 to 8x8): a threaded BLAS spends far longer waking threads than computing,
# and on a 2-core bench PC a 4x4 matrix exponential measured 5-13 ms threaded against 40 us single-threaded.
# Set before numpy is first imported (the command line and the daemon import acqd first); a value the user
# set wins.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

__version__ = "0.1.0"

MMAP_THRESHOLD_BYTES = 16 << 20  # blocks below this come from the heap, not from a fresh mapping of their own
TRIM_THRESHOLD_BYTES = 32 << 20  # free memory the heap may keep at its top before it is returned
_M_TRIM_THRESHOLD, _M_MMAP_THRESHOLD = -1, -3  # glibc's mallopt parameter numbers (malloc.h)


def _reuse_freed_blocks() -> None:
    """Let glibc's malloc keep freed blocks of up to 16 MiB for the next allocation instead of unmapping them.

    Why: the comparator's arrays (a 45,000 × 4 Jacobian, 15,000 × 8 sensitivity states) are a few hundred
    KiB to a few MiB, above glibc's default 128 KiB mapping threshold, so each one was mapped when numpy
    allocated it and unmapped when it was freed, and every first write to a fresh page is a page fault. On
    the bench PC's virtual machine that cost more than the arithmetic: one sensitivity propagation took
    1.5-1.9 ms with the defaults and 0.5 ms with these thresholds. A user's own ``MALLOC_MMAP_THRESHOLD_``
    or ``MALLOC_TRIM_THRESHOLD_`` wins; elsewhere than glibc nothing changes.
    """
    if "MALLOC_MMAP_THRESHOLD_" in os.environ or "MALLOC_TRIM_THRESHOLD_" in os.environ:
        return
    import ctypes
    import platform

    if platform.libc_ver()[0] != "glibc":
        return
    try:
        mallopt = ctypes.CDLL(None).mallopt
    except (OSError, AttributeError):
        return
    mallopt(_M_MMAP_THRESHOLD, MMAP_THRESHOLD_BYTES)
    mallopt(_M_TRIM_THRESHOLD, TRIM_THRESHOLD_BYTES)


_reuse_freed_blocks()
