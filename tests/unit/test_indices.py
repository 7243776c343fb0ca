"""Index arrays as unsigned views for the compiled sweeps (fe3d/_indices.py).

Reference: numpy's own view semantics (the view shares the array's memory and reinterprets
its bytes; for non-negative values below 2³¹ or 2⁶³ the unsigned reading is the same
number). The products on the views are checked bit for bit against scipy's in
tests/unit/test_sgs.py and tests/unit/test_free_block.py.
"""

from __future__ import annotations

import numpy as np

from fe3d._indices import unsigned


def test_unsigned_is_a_view_with_the_same_values() -> None:
    for kind, want in ((np.int32, np.uint32), (np.int64, np.uint64)):
        ids = np.array([0, 3, 7, 2**31 - 1 if kind is np.int32 else 2**40], dtype=kind)
        view = unsigned(ids)
        assert view.dtype == want
        assert np.shares_memory(view, ids)
        assert np.array_equal(view.astype(np.int64), ids.astype(np.int64))
    already = np.arange(4, dtype=np.uint32)
    assert unsigned(already) is already

