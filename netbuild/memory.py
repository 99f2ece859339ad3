"""This process's memory, read from Linux's /proc (standard library only, so the
determinization child can import it without loading more than pynini).

- `status_bytes(field)`: a byte field of /proc/self/status ("VmHWM", "VmRSS"), or None.
- `peak_rss()`: the peak resident set size in bytes (VmHWM, else getrusage).
- `current_rss()`: the resident set size now, in bytes (0 where unknown).
- `reset_peak()`: resets the peak (writes 5 to /proc/self/clear_refs); True on success.
- `release_free_memory()`: gives the C allocator's free pages back (glibc malloc_trim).
"""

from __future__ import annotations

import resource


def status_bytes(field: str) -> int | None:
    """Returns the /proc/self/status field `field` (given in kB) in bytes, or None."""
    try:
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith(field + ":"):
                    return int(line.split()[1]) * 1024
    except OSError:
        return None
    return None


def peak_rss() -> int:
    """This process's peak resident set size in bytes (VmHWM, else getrusage)."""
    hwm = status_bytes("VmHWM")
    if hwm is not None:
        return hwm
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024  # Linux: KiB


def current_rss() -> int:
    """This process's resident memory now, in bytes (0 where /proc is missing)."""
    return status_bytes("VmRSS") or 0


def reset_peak() -> bool:
    """Resets this process's VmHWM (Linux: write 5 to clear_refs); True on success."""
    try:
        with open("/proc/self/clear_refs", "w", encoding="ascii") as fh:
            fh.write("5")
        return True
    except OSError:
        return False


_TRIM: list = []  # the C library's malloc_trim, or None, once looked up


def release_free_memory() -> bool:
    """Gives the C allocator's free pages back to the system; True when it could.

    A freed FST leaves its many small blocks in the allocator's free lists, resident
    until reused; large numpy arrays are mapped apart and cannot reuse them, so the
    freed FST keeps counting in the resident size (and in the peak of what follows).
    glibc's ``malloc_trim(0)`` returns every whole free page. Where the C library has
    no ``malloc_trim`` (not glibc) this does nothing and returns False.
    """
    if not _TRIM:
        import ctypes

        try:
            # The C library the process already has loaded: no search for it (looking
            # it up by name runs ldconfig in a child process).
            trim = ctypes.CDLL(None).malloc_trim
            trim.argtypes, trim.restype = [ctypes.c_size_t], ctypes.c_int
        except (OSError, AttributeError):
            trim = None
        _TRIM.append(trim)
    trim = _TRIM[0]
    if trim is None:
        return False
    trim(0)
    return True
