"""The process's store of loaded match records: bounded by entries and by bytes, least
recently used first out; a file larger than the whole budget is served, not kept."""

import numpy as np

from evaluation.outcomes import _Kept, _nbytes


class _Loads:
    def __init__(self):
        self.count = 0

    def __call__(self, size):
        def load():
            self.count += 1
            return np.zeros(size, dtype=np.uint8)

        return load


def test_bounded_by_bytes_least_recently_used_first():
    kept, loads = _Kept(10, max_bytes=100, weigh=lambda a: a.nbytes), _Loads()
    kept.get("a", loads(40))
    kept.get("b", loads(40))
    kept.get("a", loads(40))  # a is now the most recent
    kept.get("c", loads(40))  # 120 bytes: b goes
    assert list(kept.items) == ["a", "c"] and kept.bytes == 80 and loads.count == 3
    kept.get("b", loads(40))
    assert loads.count == 4 and "a" not in kept.items


def test_bounded_by_entries_and_oversized_values_are_not_kept():
    kept, loads = _Kept(2, max_bytes=100, weigh=lambda a: a.nbytes), _Loads()
    for key in "xyz":
        kept.get(key, loads(1))
    assert list(kept.items) == ["y", "z"]
    big = kept.get("big", loads(101))
    assert big.nbytes == 101 and "big" not in kept.items and kept.bytes == 2
    kept.clear()
    assert not kept.items and kept.bytes == 0


def test_records_are_weighed_by_their_arrays():
    class Records:
        def __init__(self):
            self.protocol = "coco"
            self.det_box = np.zeros((10, 4))
            self.det_image = np.zeros(10, dtype=np.int32)

    assert _nbytes(Records()) == 10 * 4 * 8 + 10 * 4
