"""``npz_view`` reads an ``.npz`` file's arrays in place; the reference is numpy's own
reader, ``np.load`` (numpy 2.4, the version pinned in requirements), on the same file:
every array equal, same dtype, shape and memory order, writable as ``np.load``'s are."""

import zipfile

import numpy as np
import pytest

from evaluation.engine import npz_view

ARRAYS = {
    "ints": np.arange(-5, 7, dtype=np.int32),
    "floats": np.array([[0.5, np.nan], [np.inf, -1e-300]]),
    "boxes": np.random.default_rng(3).random((1000, 4)),
    "fortran": np.asfortranarray(np.arange(12, dtype=np.int64).reshape(3, 4)),
    "flags": np.array([[True, False, True]]),
    "empty": np.zeros((0, 4), np.float64),
    "text": np.array("coco"),
    "names": np.array(("person", "traffic_light")),
    "uint8": np.arange(7, dtype=np.uint8),
}


def _same(found, expected):
    assert set(found) == set(expected)
    for name, array in expected.items():
        got = found[name]
        assert got.dtype == array.dtype and got.shape == array.shape, name
        assert got.flags.f_contiguous == array.flags.f_contiguous, name
        np.testing.assert_array_equal(got, array, err_msg=name)


@pytest.mark.parametrize("writer", [np.savez, np.savez_compressed])
def test_arrays_equal_what_np_load_reads(tmp_path, writer):
    """Stored (``np.savez``, as ``MatchRecords.save`` writes) and deflated
    (``np.savez_compressed``, as records were written before) files alike."""
    path = tmp_path / "a.npz"
    writer(path, **ARRAYS)
    with np.load(path, allow_pickle=False) as data:
        reference = {k: data[k] for k in data.files}
    found = npz_view.arrays(npz_view.read_file(path))
    _same(found, reference)
    _same(found, ARRAYS)
    assert all(a.flags.writeable for a in found.values())


def test_stored_members_are_views_of_the_checked_bytes(tmp_path):
    """An uncompressed member is read in place: its array shares the buffer that was
    read (and hashed), so no later read of the file can hand over other bytes."""
    path = tmp_path / "a.npz"
    np.savez(path, boxes=ARRAYS["boxes"])
    buffer = npz_view.read_file(path)
    boxes = npz_view.arrays(buffer)["boxes"]
    assert np.shares_memory(boxes, buffer)
    with open(path, "r+b") as f:  # the file changes after it was read: the arrays do not
        f.seek(-200, 2)
        f.write(b"\xff" * 8)
    np.testing.assert_array_equal(boxes, ARRAYS["boxes"])


def test_object_arrays_are_refused(tmp_path):
    """As ``np.load(allow_pickle=False)`` refuses them."""
    path = tmp_path / "a.npz"
    np.savez(path, things=np.array([{"a": 1}, None], dtype=object))
    with pytest.raises(ValueError, match="allow_pickle"):
        np.load(path, allow_pickle=False)["things"]
    with pytest.raises(ValueError, match="things.npy: object arrays are not read"):
        npz_view.arrays(npz_view.read_file(path))


def test_a_truncated_file_is_an_error_not_garbage(tmp_path):
    """A member that claims more bytes than the file holds is refused."""
    path = tmp_path / "a.npz"
    np.savez(path, boxes=ARRAYS["boxes"])
    data = bytearray(npz_view.read_file(path))
    with zipfile.ZipFile(path) as z:
        info = z.getinfo("boxes.npy")
    # Claim a larger array in the member's header than its bytes hold.
    start = data.index(b"(1000, 4)")
    data[start : start + 9] = b"(9000, 4)"
    with pytest.raises(ValueError, match="boxes.npy: array runs past its member"):
        npz_view.arrays(data)
    assert info.compress_type == zipfile.ZIP_STORED
