"""Where files live in the storage, and how the engine gets a local path to them."""

import contextlib
import hashlib
import os
import shutil
import tempfile


def split_path(instance, filename):
    return f"splits/{instance.name}/rev{instance.revision}/{os.path.basename(filename)}"


def predictions_path(instance, filename):
    return f"predictions/{instance.sha256[:2]}/{instance.sha256}/{os.path.basename(filename)}"


_BLOCK = 1 << 20


class ContentMismatch(Exception):
    """A stored file no longer holds the content whose SHA-256 was recorded with it."""

    def __init__(self, what, name, expected, actual):
        super().__init__(
            f"{what} does not match its hash: {name} should have SHA-256 {expected[:16]}…, "
            f"it has {actual[:16]}… (changed in storage after it was recorded)"
        )
        self.what, self.name, self.expected, self.actual = what, name, expected, actual

    def as_dict(self):
        return {
            "what": self.what,
            "file": self.name,
            "expected_sha256": self.expected,
            "actual_sha256": self.actual,
        }


def file_sha256(path):
    digest = hashlib.sha256()
    with open(path, "rb") as f:
        while block := f.read(_BLOCK):
            digest.update(block)
    return digest.hexdigest()


def check_sha256(subject, what, name, expected, actual):
    """Raise ContentMismatch (and signal it, for the audit trail) when the hashes differ.

    ``subject`` names the row (``split:3``); a missing ``expected`` (recorded before
    hashes were kept) checks nothing.
    """
    if expected and actual != expected:
        from . import signals

        error = ContentMismatch(what, name, expected, actual)
        signals.content_mismatch.send(ContentMismatch, subject=subject, error=error)
        raise error


@contextlib.contextmanager
def verified_path(field_file, expected, subject, what, name=None):
    """``local_path`` of a stored file whose bytes were hashed against ``expected`` just
    before use (ContentMismatch if they differ, naming the file ``name``: by default its
    stored name). The engine's cache is keyed by the
    SHA-256 of the bytes it reads, so a changed file is never served from an entry
    made for the old one."""
    with local_path(field_file) as path:
        name = name or os.path.basename(field_file.name)
        check_sha256(subject, what, name, expected, file_sha256(path))
        yield path


def verified_bytes(field_file, expected, subject, what, name=None):
    """A stored file's bytes (a uint8 array, read once) checked against ``expected``
    (ContentMismatch, signalled for the audit trail, if they differ): the caller parses
    the very bytes that were hashed."""
    from .engine.npz_view import read_file

    name = name or os.path.basename(field_file.name)
    with local_path(field_file) as path:
        buffer = read_file(path)
    check_sha256(subject, what, name, expected, hashlib.sha256(buffer).hexdigest())
    return buffer


def verified_predictions(evaluation):
    """``verified_path`` of an evaluation's stored predictions file, named as its
    requester uploaded it."""
    prediction_file = evaluation.predictions
    return verified_path(
        prediction_file.file,
        prediction_file.sha256,
        f"predictions:{prediction_file.pk}",
        "predictions file",
        evaluation.name,
    )


@contextlib.contextmanager
def local_path(field_file):
    """A filesystem path for a stored file: the file itself when the storage is a
    local disk, else a temporary copy (object stores)."""
    try:
        yield field_file.path
        return
    except NotImplementedError:
        pass
    suffix = os.path.splitext(field_file.name)[1]
    with tempfile.NamedTemporaryFile(suffix=suffix) as tmp:
        with field_file.open("rb") as src:
            shutil.copyfileobj(src, tmp)
        tmp.flush()
        yield tmp.name


def save_from_path(field_file, path, name):
    """``field_file.save(name, <the file at path>, save=False)`` without copying the
    bytes where the storage is a local disk on the same file system: a hard link to
    ``path`` is moved into the storage (same bytes, same inode), and ``path`` stays
    as it was. Elsewhere (no hard links, another file system, an object store) the
    bytes are copied as ``FieldFile.save`` always does."""
    from django.core.files import File

    class Linked(File):
        # FileSystemStorage moves a file that has a temporary path instead of copying
        def temporary_file_path(self):
            return link

    link = f"{path}.{os.getpid()}.link"
    try:
        os.link(path, link)
    except OSError:
        link = None
    try:
        with open(path, "rb") as f:
            field_file.save(name, (Linked if link else File)(f, name=name), save=False)
    finally:
        if link is not None and os.path.lexists(link):  # not moved (copied or failed)
            os.remove(link)


class TooLarge(Exception):
    pass


def fitted_name(name, limit=200):
    """The upload's base name, shortened to ``limit`` UTF-8 bytes (file systems allow
    255) with its extension kept.

    >>> name = fitted_name("uploads/" + "é" * 200 + ".json")
    >>> name[-8:], len(name.encode())
    ('ééé.json', 199)
    """
    name = os.path.basename(name) or "upload"
    if len(name.encode()) <= limit:
        return name
    stem, extension = os.path.splitext(name)
    room = limit - len(extension.encode())
    return stem.encode()[:room].decode(errors="ignore") + extension


def spool(uploaded, limit, directory):
    """Copy an upload into ``directory`` under its own base name, in blocks, hashing
    as it goes (so engine errors name the file as the user knows it).

    Returns ``(path, sha256, size)``; raises ``TooLarge`` past ``limit`` bytes. The
    web process holds one block at a time, never the whole file.
    """
    digest = hashlib.sha256()
    size = 0
    path = os.path.join(directory, fitted_name(uploaded.name))
    chunks = (
        uploaded.chunks()
        if hasattr(uploaded, "chunks")
        else iter(lambda: uploaded.read(1 << 20), b"")
    )
    with open(path, "wb") as out:
        for chunk in chunks:
            size += len(chunk)
            if size > limit:
                raise TooLarge(
                    f"{os.path.basename(path)}: larger than the upload limit of {limit:,} bytes"
                )
            digest.update(chunk)
            out.write(chunk)
    return path, digest.hexdigest(), size


# Room for the multipart envelope and the form's other fields beside the file.
ENVELOPE_BYTES = 1024 * 1024


def oversized(request):
    """Why a request is refused before its body is read — its declared
    ``Content-Length`` is over ``BENCHBOOK_MAX_UPLOAD_BYTES`` plus the envelope — or
    None. Reads only the header."""
    from django.conf import settings
    from django.template.defaultfilters import filesizeformat

    limit = settings.BENCHBOOK_MAX_UPLOAD_BYTES
    try:
        length = int(request.META.get("CONTENT_LENGTH") or 0)
    except ValueError:
        return None  # Django reads no body without a valid length
    if length <= limit + ENVELOPE_BYTES:
        return None

    def words(n):
        size = filesizeformat(n).replace("\xa0", " ")
        return size if n < 1024 else f"{size} ({n:,} bytes)"

    return f"the request is {words(length)}; the upload limit is {words(limit)} per file"
