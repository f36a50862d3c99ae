"""Process-level helpers shared by every room (standard library only): holding Ctrl-C
until a critical call returns, the first-call guard of compiled kernels, and memory
(available memory, a small heap).
"""

from __future__ import annotations

import multiprocessing
import os
import signal
import sys
import threading
from contextlib import contextmanager, nullcontext


def fork_safe_threads() -> None:
    """Have numba's parallel kernels use a threading layer that survives a fork.

    The worker processes of :func:`forked_map` are forked from a process that has run
    parallel kernels; with the GNU OpenMP layer a forked worker that runs one in turn is
    terminated ("fork() called from a process already using GNU OpenMP"), and its pool
    waits for it for ever. numba's "forksafe" choice takes TBB, Intel OpenMP or its own
    work queue instead. A layer the user chose (NUMBA_THREADING_LAYER) is kept.
    """
    if "NUMBA_THREADING_LAYER" in os.environ:
        return
    os.environ["NUMBA_THREADING_LAYER"] = "forksafe"  # read when numba is imported ...
    numba = sys.modules.get("numba")
    if numba is not None:  # ... or set on its configuration if it already is
        numba.config.THREADING_LAYER = "forksafe"


fork_safe_threads()


@contextmanager
def interrupt_after(until: str = "the file being written is closed"):
    """Hold Ctrl-C (SIGINT) back until the block has finished, then raise KeyboardInterrupt;
    ``until`` ends the message printed when one arrives.

    A KeyboardInterrupt raised inside the NetCDF library's Python layer can land between
    taking a file lock and the code that releases it; closing the file then waits on that
    lock for ever (seen once in CI as a hung Ctrl-C test). Outside the main thread, where
    no signal handler can be set, the block runs unguarded.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    received = []

    def hold(signum, frame):
        if not received:
            print(f"upscale: interrupt received; stopping once {until}", file=sys.stderr, flush=True)
        received.append(signum)

    previous = signal.signal(signal.SIGINT, hold)
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)
    if received:
        raise KeyboardInterrupt


def first_call(kernel):
    """Context for a call of a numba ``kernel``: on its first call in this process (when it
    compiles, or loads from the cache) Ctrl-C is held until the call returns: an interrupt
    landing in numba's compiler was lost (the run went on) or ended in a traceback."""
    return nullcontext() if kernel.signatures else interrupt_after("the compiled kernels are ready")


#: arrays from this size up get their own memory map, returned to the system when freed
#: (glibc otherwise raises its threshold after each free and keeps freed arrays in the heap;
#: the effect on the 8 M-cell benchmark is in DEVELOPERS.md)
MMAP_THRESHOLD = 4 * 2 ** 20


def keep_heap_small() -> None:
    """Fix glibc's memory-map threshold for this process (and, by the environment, for
    worker processes started after); nothing elsewhere."""
    os.environ.setdefault("MALLOC_MMAP_THRESHOLD_", str(MMAP_THRESHOLD))
    try:
        import ctypes

        libc = ctypes.CDLL("libc.so.6")
        libc.mallopt(-3, MMAP_THRESHOLD)  # M_MMAP_THRESHOLD
    except (OSError, AttributeError):
        pass


def release_free_memory() -> None:
    """Return the heap's free pages to the system (glibc's ``malloc_trim``); nothing elsewhere.

    Arrays below the memory-map threshold (a file reader's chunk buffers, the many small
    arrays of a validation) stay resident in the heap after they are freed, and count again
    in every worker forked after.
    """
    try:
        import ctypes

        ctypes.CDLL("libc.so.6").malloc_trim(0)
    except (OSError, AttributeError):
        pass


_BUDGET = None  # bytes a command was given (--memory), or None


def hold_to_budget(memory: int | None) -> None:
    """From now on, in this process and the processes it forks, :func:`available_memory`
    reports at most ``memory`` bytes (a command's --memory); None lifts the cap."""
    global _BUDGET
    _BUDGET = None if memory is None else int(memory)


def available_memory() -> int:
    """MemAvailable from /proc/meminfo in bytes (total physical memory where unknown), at
    most the budget of :func:`hold_to_budget`."""
    found = None
    try:
        with open("/proc/meminfo") as handle:
            for line in handle:
                if line.startswith("MemAvailable:"):
                    found = int(line.split()[1]) * 1024
                    break
    except OSError:
        pass
    if found is None:
        found = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    return found if _BUDGET is None else min(found, _BUDGET)


_SHARED = None  # (function, data) the forked workers of forked_map read, inherited, not pickled


def _then_release(result):
    """``result``, once the heap's free pages are returned (:func:`release_free_memory`)."""
    release_free_memory()
    return result


def _run_shared(job):
    function, data = _SHARED
    return function(data, job)


def _ignore_interrupt() -> None:
    """Worker initialiser: ignore Ctrl-C, which the parent handles by ending the workers."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)


def forked_map(function, data, jobs: list, processes: int) -> list:
    """``[function(data, job) for job in jobs]`` on up to ``processes`` forked workers.

    ``data`` (e.g. a large field) is inherited by the workers, not pickled; jobs and
    results are. With one process, or where fork is missing, everything runs here. Ctrl-C
    or a failure in a worker ends them all at once. The heap's free pages are returned to
    the system before the workers fork, and after each job run here.
    """
    global _SHARED
    release_free_memory()
    if processes <= 1 or len(jobs) <= 1 or "fork" not in multiprocessing.get_all_start_methods():
        return [_then_release(function(data, job)) for job in jobs]
    _SHARED = (function, data)
    pool = multiprocessing.get_context("fork").Pool(min(processes, len(jobs)), initializer=_ignore_interrupt)
    try:
        results = pool.map(_run_shared, jobs, chunksize=1)
        pool.close()
        return results
    except BaseException:
        pool.terminate()
        raise
    finally:
        pool.join()
        _SHARED = None
