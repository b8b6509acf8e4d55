"""The arrays of an ``.npz`` file held in memory, without copying them.

``np.load`` copies every member out of the archive and checks its CRC-32 on the way
(about 0.12 s of CPU for a 65 MB records file of 500,000 detections). The records are
hash-checked as a whole file (SHA-256) before they are parsed, so the members of an
uncompressed archive are read in place: each array is a view into the one buffer
that was hashed — there is no second read of the file between the check and the use.
Members stored deflated (files written before records were stored uncompressed) are
inflated as ``np.load`` would.

Writable buffers (``read_file``'s array, a ``bytearray``) give writable arrays, as
``np.load`` does; the views keep the buffer alive. Object arrays are refused
(``allow_pickle=False``).
"""

import io
import os
import struct
import zipfile

import numpy as np

_LOCAL_HEADER = struct.Struct("<4s22xHH")  # signature, ..., name length, extra length
_LOCAL_SIGNATURE = b"PK\x03\x04"


def read_file(path):
    """The file's bytes, read once into a writable uint8 array (not zeroed first, as a
    ``bytearray`` would be: that pass cost as much as the read)."""
    with open(path, "rb", buffering=0) as f:
        size = os.fstat(f.fileno()).st_size
        buffer = np.empty(size, np.uint8)
        view, done = memoryview(buffer), 0
        while done < size:
            got = f.readinto(view[done:])
            if not got:
                raise OSError(f"{path}: file shrank while it was read ({done} of {size} bytes)")
            done += got
    return buffer


def arrays(buffer):
    """``{name: array}`` of every ``name.npy`` member of the archive in ``buffer``."""
    view = memoryview(buffer)
    out = {}
    with zipfile.ZipFile(_Reader(view)) as z:
        for info in z.infolist():
            if not info.filename.endswith(".npy"):
                continue
            name = info.filename[: -len(".npy")]
            if info.compress_type == zipfile.ZIP_STORED:
                out[name] = _stored(buffer, view, info)
            else:  # deflated: inflate, as np.load does
                data = z.read(info)
                out[name] = np.lib.format.read_array(io.BytesIO(data), allow_pickle=False)
    return out


def _stored(buffer, view, info):
    """The array of an uncompressed member, a view into ``buffer``."""
    start = info.header_offset
    signature, name_length, extra_length = _LOCAL_HEADER.unpack_from(view, start)
    if signature != _LOCAL_SIGNATURE:
        raise ValueError(f"{info.filename}: no local header at byte {start}")
    begin = start + _LOCAL_HEADER.size + name_length + extra_length
    end = begin + info.file_size
    if end > len(view):
        raise ValueError(f"{info.filename}: member runs past the end of the file")
    head = io.BytesIO(view[begin : min(end, begin + 65536)])
    version = np.lib.format.read_magic(head)
    if version == (1, 0):
        shape, fortran_order, dtype = np.lib.format.read_array_header_1_0(head)
    elif version == (2, 0):
        shape, fortran_order, dtype = np.lib.format.read_array_header_2_0(head)
    else:  # (3, 0): a UTF-8 header; rare, read by copy
        return np.lib.format.read_array(io.BytesIO(view[begin:end]), allow_pickle=False)
    if dtype.hasobject:
        raise ValueError(f"{info.filename}: object arrays are not read (allow_pickle=False)")
    count = int(np.prod(shape, dtype=np.int64))
    offset = begin + head.tell()
    if offset + count * dtype.itemsize > end:
        raise ValueError(f"{info.filename}: array runs past its member")
    array = np.frombuffer(buffer, dtype=dtype, count=count, offset=offset)
    return array.reshape(shape, order="F" if fortran_order else "C")


class _Reader(io.RawIOBase):
    """A read-only file over a memoryview (``io.BytesIO`` would copy the buffer)."""

    def __init__(self, view):
        self.view, self.position = view, 0

    def readable(self):
        return True

    def seekable(self):
        return True

    def seek(self, offset, whence=0):
        base = (0, self.position, len(self.view))[whence]
        self.position = max(0, base + offset)
        return self.position

    def tell(self):
        return self.position

    def readinto(self, target):
        chunk = self.view[self.position : self.position + len(target)]
        target[: len(chunk)] = chunk
        self.position += len(chunk)
        return len(chunk)
