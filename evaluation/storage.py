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
