"""The files of a label folder or zip archive, read with limits.

KITTI, YOLO and VOC splits come as many small files: a folder, or a zip of one (VOC
detection results may also come as one class's lone result file). All are read the
same way here, by relative member name (``labels/000012.txt``), and
nothing is ever extracted to disk, so a member name cannot write anywhere; names
that would escape the folder (absolute, ``..``, drive letters) are still refused, as
are symbolic links leaving it, so what is scored is what the folder holds.

Zip bombs: a member is decompressed through a stream and cut off at
``MAX_MEMBER_BYTES`` of *actual* output (the sizes an archive declares can lie), and
the text read from one archive is capped at ``MAX_TOTAL_BYTES``; image members are
only ever read for their first ``HEADER_BYTES``. Operating-system metadata
(``__MACOSX/``, dot files) is skipped. Anything else that is not a regular file (a
named pipe, a socket, a device, a broken link) is refused, naming it, and so are two
zip members of one name (``zipfile`` would read only the last).
"""

import os
import posixpath
import re
import stat
import zipfile
import zlib

from ..errors import InputError

MAX_MEMBERS = 500_000
#: One label file or XML annotation: far above any real one.
MAX_MEMBER_BYTES = 16 << 20
#: All label text read from one folder or archive.
MAX_TOTAL_BYTES = 2 << 30
#: Enough of an image file to find its width and height.
HEADER_BYTES = 1 << 16


#: A VOC detection result file, ``comp4_det_test_car.txt``: competition id, ``_det_``,
#: image set, class (``voc_results``).
RESULT_FILE_NAME = re.compile(r"^(?P<comp>[^_/]+)_det_(?P<rest>.+)\.txt$", re.IGNORECASE)


def is_collection(path):
    """A folder, a file that is a zip archive (by its content, not its name), or a
    lone VOC result file (``comp4_det_test_car.txt``, its class in its name): read
    as a collection of that one file."""
    if os.path.isdir(path):
        return True
    return os.path.isfile(path) and (zipfile.is_zipfile(path) or is_single_result(path))


def is_single_result(path):
    """A plain file named like a VOC detection result file (not a zip)."""
    return (
        RESULT_FILE_NAME.match(os.path.basename(str(path))) is not None
        and os.path.isfile(path)
        and not zipfile.is_zipfile(path)
    )


def _kind(path):
    """What a non-regular file is, in words."""
    try:
        mode = os.stat(path).st_mode
    except OSError:
        return "a symbolic link to nothing"
    if stat.S_ISFIFO(mode):
        return "a named pipe"
    if stat.S_ISSOCK(mode):
        return "a socket"
    if stat.S_ISCHR(mode) or stat.S_ISBLK(mode):
        return "a device"
    return "not a file"


def _skipped(name):
    parts = name.split("/")
    return any(p.startswith(".") or p == "__MACOSX" for p in parts)


def _check_name(path, name):
    bad = (
        name.startswith("/")
        or "\\" in name
        or (len(name) > 1 and name[1] == ":")
        or ".." in name.split("/")
    )
    if bad:
        raise InputError(
            path,
            "the member's name leaves the archive (absolute path, '..' or a drive letter); refused",
            record=name,
        )


class Members:
    """Read-only access to the files of a folder or zip, by relative POSIX name.

    Use as a context manager; ``names`` lists the regular files, sorted.
    """

    def __init__(self, path):
        self.path = str(path)
        self._zip = None
        self._read_total = 0
        self._single = None
        if os.path.isdir(path):
            self.names = self._walk()
        elif is_single_result(path):
            self._single = self.path
            self.names = [os.path.basename(self.path)]
        else:
            try:
                self._zip = zipfile.ZipFile(path)
            except (zipfile.BadZipFile, OSError) as e:
                raise InputError(path, f"not a readable zip archive: {e}") from None
            self.names = self._zip_names()
        if len(self.names) > MAX_MEMBERS:
            raise InputError(path, f"{len(self.names)} files: more than the {MAX_MEMBERS} accepted")

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        if self._zip is not None:
            self._zip.close()

    def _walk(self):
        root = os.path.realpath(self.path)
        names = []
        for folder, dirs, files in os.walk(root):
            dirs[:] = sorted(d for d in dirs if not d.startswith(".") and d != "__MACOSX")
            for file in files:
                full = os.path.join(folder, file)
                name = os.path.relpath(full, root).replace(os.sep, "/")
                if _skipped(name):
                    continue
                if os.path.islink(full):
                    target = os.path.realpath(full)
                    if os.path.commonpath([root, target]) != root:
                        raise InputError(
                            self.path,
                            "a symbolic link pointing outside the folder; refused",
                            record=name,
                        )
                if os.path.isfile(full):
                    names.append(name)
                else:  # a pipe, socket, device or broken link: refused, as with --cache
                    raise InputError(
                        self.path,
                        f"not a regular file ({_kind(full)}); a label folder holds files; refused",
                        record=name,
                    )
        return sorted(names)

    def _zip_names(self):
        names = []
        for info in self._zip.infolist():
            if info.is_dir():
                continue
            name = info.filename
            _check_name(self.path, name)
            if _skipped(name):
                continue
            if stat.S_ISLNK(info.external_attr >> 16):
                raise InputError(
                    self.path, "a symbolic link inside the archive; refused", record=name
                )
            if info.flag_bits & 0x1:
                raise InputError(self.path, "the member is encrypted", record=name)
            names.append(name)
        names.sort()
        for earlier, name in zip(names, names[1:]):
            if earlier == name:  # zipfile reads only the last of them by name
                raise InputError(
                    self.path,
                    "two members of the archive have this name: which one to read "
                    "is ambiguous; refused",
                    record=name,
                )
        return names

    def read(self, name, limit=MAX_MEMBER_BYTES):
        """The member's bytes; an error past ``limit`` bytes (counted as decompressed)."""
        data = self._open_read(name, limit + 1)
        if len(data) > limit:
            raise InputError(
                self.path, f"larger than {limit >> 20} MB: not a label file", record=name
            )
        self._read_total += len(data)
        if self._read_total > MAX_TOTAL_BYTES:
            raise InputError(
                self.path,
                f"more than {MAX_TOTAL_BYTES >> 30} GB of label text: refused",
                record=name,
            )
        return data

    def head(self, name, size=HEADER_BYTES):
        """The member's first ``size`` bytes (for image headers)."""
        return self._open_read(name, size)

    def _open_read(self, name, size):
        try:
            if self._single is not None:
                with open(self._single, "rb") as f:
                    return f.read(size)
            if self._zip is None:
                with open(os.path.join(self.path, *name.split("/")), "rb") as f:
                    return f.read(size)
            with self._zip.open(name) as f:
                return f.read(size)
        except (OSError, zipfile.BadZipFile, EOFError, RuntimeError, zlib.error) as e:
            raise InputError(self.path, f"cannot read: {e}", record=name) from None
        except NotImplementedError as e:  # a compression method zipfile lacks
            raise InputError(self.path, f"cannot read: {e}", record=name) from None


def stem(name):
    """``labels/000012.txt`` -> ``000012``."""
    return posixpath.splitext(posixpath.basename(name))[0]


def extension(name):
    return posixpath.splitext(name)[1].lower()


def decode_text(path, name, data):
    """UTF-8 text of a member (a byte-order mark is dropped)."""
    if data.startswith(b"\xef\xbb\xbf"):
        data = data[3:]
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as e:
        line = data[: e.start].count(b"\n") + 1
        raise InputError(path, "not UTF-8 text", record=f"{name} line {line}") from None
