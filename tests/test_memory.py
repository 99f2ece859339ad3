"""Tests of the process memory helpers (netbuild/memory.py)."""

from __future__ import annotations

import numpy as np
import pytest

from netbuild.io.fstfile import arrays_to_fst
from netbuild.memory import current_rss, release_free_memory

_MB = 1024 * 1024


def _chain(n: int):
    """A vector FST of n states in a line (about 72 bytes per state on the C heap)."""
    src = np.arange(n - 1, dtype=np.int64)
    ones = np.ones(n - 1, dtype=np.int64)
    finals = np.full(n, np.inf, dtype=np.float32)
    finals[-1] = 0.0
    return arrays_to_fst(n, 0, finals, src, ones, ones, np.zeros(n - 1, np.float32),
                         src + 1)


def test_release_gives_a_freed_fst_back():
    """A freed FST below a live one stays resident until the free pages are returned."""
    if not release_free_memory() or not current_rss():
        pytest.skip("no malloc_trim (not glibc) or no /proc")
    big = _chain(1_000_000)
    pin = _chain(1_000)  # allocated after `big`, so the heap cannot simply shrink
    release_free_memory()
    loaded = current_rss()
    del big
    freed = current_rss()
    release_free_memory()
    trimmed = current_rss()
    # 1M states take at least 48 MB on the heap (netbuild.footprint: 72 bytes a state).
    assert trimmed < freed - 30 * _MB, (loaded, freed, trimmed)
    assert pin.num_states() == 1_000
