"""Keep freed memory in the process for reuse (glibc only).

Coarsening and set assembly call it (ingest does not: see
:func:`lesprep.canonical.ingest.ingest_case`). They allocate the same large float64
working arrays again for each output time.
By default glibc hands blocks above 32 MiB straight back to the operating system, so
each time step pays for fresh pages again (on virtual machines that back memory lazily
this costs more than the arithmetic). Disabling mmap for large blocks and trimming of
the heap lets the next time step reuse the same pages. The resident size then stays at
the job's peak, which is bounded by one time step, not by the run length.

With mmap disabled every thread's arena keeps what it freed, so a job whose I/O threads
each get their own arena holds several copies of its transient encode buffers (measured
on a 512 x 512 x 160 coarsening: 6.1 GB peak with the default 8 arenas per core, 4.9 GB
with 2 arenas). The number of arenas is therefore capped at :data:`ARENAS`.
"""

from __future__ import annotations

import ctypes
import ctypes.util
from functools import cache

_M_TRIM_THRESHOLD = -1
_M_TOP_PAD = -2
_M_MMAP_MAX = -4
_M_ARENA_MAX = -8

ARENAS = 2


@cache
def retain_freed_memory() -> bool:
    """Tune glibc's allocator once per process; False where it is not glibc."""
    name = ctypes.util.find_library("c")
    if not name:
        return False
    try:
        libc = ctypes.CDLL(name)
        mallopt = libc.mallopt
    except (OSError, AttributeError):
        return False
    ok = mallopt(_M_MMAP_MAX, 0) == 1
    ok &= mallopt(_M_TRIM_THRESHOLD, 2**31 - 1) == 1
    ok &= mallopt(_M_TOP_PAD, 64 * 2**20) == 1
    ok &= mallopt(_M_ARENA_MAX, ARENAS) == 1
    return bool(ok)
