"""A columnar cache of parsed input: ``<cache_dir>/<sha256>.npz``.

The key is the SHA-256 of the source bytes plus the loading options, so a changed
file or option is a different entry; an entry is written atomically (temp + rename).

Each entry carries ``__digest__``, an HMAC-SHA256 of its key and of every column (name,
dtype, shape, bytes) under ``Cache.secret``, checked on every load: an entry edited in
place — or one written without the digest — is rebuilt from its source, and
``Cache.on_rebuilt`` is told. Without a secret (the CLI) the digest is keyed by the
empty string, which still catches corruption and naive edits; the platform passes a
secret derived from its own, so an entry forged by someone who can write the cache
folder but not read the settings is caught too.
"""

import contextlib
import dataclasses
import hashlib
import hmac
import json
import logging
import os
import stat
import tempfile

import numpy as np

from ..data import GroundTruth, Predictions
from ..errors import InputError
from .members import Members, is_single_result

_TYPES = {"truth": GroundTruth, "predictions": Predictions}
_BLOCK = 1 << 20
_DIGEST = "__digest__"
log = logging.getLogger(__name__)


@dataclasses.dataclass(frozen=True)
class Cache:
    """Where entries live, the secret their digests are keyed with, and who is told
    (``on_rebuilt(path, reason)``) when an entry failed its check and was rebuilt."""

    directory: str
    secret: bytes = b""
    on_rebuilt: object = None


def entry_digest(secret, key, arrays):
    """HMAC-SHA256 under ``secret`` of the entry's key and its columns, in name order
    (RFC 2104; each column as name, dtype, shape and raw bytes)."""
    mac = hmac.new(secret, key.encode(), hashlib.sha256)
    for name in sorted(arrays):
        if name == _DIGEST:
            continue
        array = np.ascontiguousarray(arrays[name])
        mac.update(f"|{name}|{array.dtype.str}|{array.shape}|".encode())
        mac.update(array.data if array.size else b"")
    return mac.hexdigest()


def file_sha256(path):
    """SHA-256 of a file's bytes; of a folder, of its files' names and digests (the
    files ``Members`` lists: what is read is what is hashed). An input that cannot be
    opened is the ``InputError`` loading it gives without a cache; anything but a
    regular file or a folder (a named pipe, a device) is refused: hashing would read
    it before parsing reads it again (a pipe's bytes are gone; one without a writer
    would block forever)."""
    if os.path.isdir(path):
        return _folder_sha256(path)
    try:
        mode = os.stat(path).st_mode
        if not stat.S_ISREG(mode):
            raise InputError(
                path,
                "not a regular file (a named pipe or a device): the cache (--cache) keys "
                "an entry by the file's bytes, read before they are parsed; give a file, "
                "or no cache",
            )
        digest = hashlib.sha256()
        with open(path, "rb") as f:
            while block := f.read(_BLOCK):
                digest.update(block)
    except OSError as e:
        raise InputError(path, f"cannot open: {e.strerror}") from None
    return digest.hexdigest()


def _folder_sha256(path):
    digest = hashlib.sha256(b"folder")
    with Members(path) as members:  # its refusals (links leaving it, pipes) too
        for name in members.names:
            full = os.path.join(str(path), *name.split("/"))
            digest.update(f"{name}\0{file_sha256(full)}\n".encode())
    return digest.hexdigest()


def cache_key(sources, options):
    digest = hashlib.sha256(json.dumps(options, sort_keys=True).encode())
    for path in sources:
        if is_single_result(path):  # its class is in its name, not its bytes
            digest.update(f"voc result file {os.path.basename(path)}\0".encode())
        digest.update(file_sha256(path).encode())
    return digest.hexdigest()


#: The split's content hash, kept in a truth entry's metadata (``GroundTruth.content_hash``,
#: its ``corners`` scheme). Entries from before engine 2.23.0 kept the ``repeats`` hash,
#: before 2.22.0 the ``heights`` hash,
#: before 2.18.2 the ``named`` one, before 2.17.6 the ``typed`` one and before 2.15.0 the
#: ``untyped`` one, under ``_OLDER_HASHES``: dropped on load (the newest is computed
#: once; ``CACHE_SCHEMA`` keeps such entries unused anyway).
_CONTENT_HASH = "__corners_content_hash__"
_OLDER_HASHES = (
    "__repeats_content_hash__",
    "__heights_content_hash__",
    "__named_content_hash__",
    "__typed_content_hash__",
    "__content_hash__",
)


def _to_arrays(obj):
    arrays, meta = {}, {}
    for f in dataclasses.fields(obj):
        value = getattr(obj, f.name)
        if isinstance(value, np.ndarray):
            arrays[f.name] = value.astype(str) if value.dtype == object else value
        elif isinstance(value, tuple):  # image_tags too: JSON writes tuples as lists
            meta[f.name] = list(value)
        else:
            meta[f.name] = value
    if hasattr(obj, "content_hash"):  # signed with the entry: a load needs no re-hash
        meta[_CONTENT_HASH] = obj.content_hash()
    arrays["__meta__"] = np.array(json.dumps(meta))
    return arrays


def _from_arrays(kind, arrays):
    meta = json.loads(str(arrays["__meta__"]))
    content_hash = meta.pop(_CONTENT_HASH, None)
    for name in _OLDER_HASHES:
        meta.pop(name, None)
    values = {name: value for name, value in arrays.items() if name != "__meta__"}
    for name, value in meta.items():
        if name == "image_tags":
            value = tuple(tuple(t) for t in value)
        elif isinstance(value, list):
            value = tuple(value)
        values[name] = value
    obj = _TYPES[kind](**values)
    if content_hash is not None:
        object.__setattr__(obj, "_content_hash", content_hash)
    return obj


def cached(cache_dir, sources, options, build, kind):
    """``build()`` once per distinct input; later calls load the stored columns after
    checking their digest (a failed check rebuilds the entry). ``cache_dir``: a folder
    name, a ``Cache``, or None for no cache."""
    if cache_dir is None:
        return build()
    cache = cache_dir if isinstance(cache_dir, Cache) else Cache(str(cache_dir))
    os.makedirs(cache.directory, exist_ok=True)
    key = cache_key(sources, options)
    path = os.path.join(cache.directory, key + ".npz")
    if os.path.exists(path):
        reason = _load_checked(cache, key, path, kind)
        if not isinstance(reason, str):
            return reason
        log.warning("cache entry %s %s; rebuilt from its source", path, reason)
        if cache.on_rebuilt is not None:
            cache.on_rebuilt(path, reason)
    obj = build()
    arrays = _to_arrays(obj)
    arrays[_DIGEST] = np.array(entry_digest(cache.secret, key, arrays))
    tmp = None
    try:
        fd, tmp = tempfile.mkstemp(dir=cache.directory, suffix=".npz")
        with os.fdopen(fd, "wb") as f:
            np.savez(f, **arrays)
        os.replace(tmp, path)
    except OSError as e:  # a cache that cannot be written costs time, not the result
        log.warning("cache entry %s could not be written (%s); not cached", path, e.strerror)
        if tmp is not None:
            with contextlib.suppress(OSError):
                os.remove(tmp)
    return obj


def _load_checked(cache, key, path, kind):
    """The entry's object, or a string saying why it cannot be trusted."""
    try:
        with np.load(path, allow_pickle=False) as data:
            arrays = {name: data[name] for name in data.files}
    except Exception as e:  # noqa: BLE001 - damage shows as zip, zlib, format or OS errors
        return f"is unreadable ({type(e).__name__}: {e})"
    if _DIGEST not in arrays:
        return "has no digest"
    if not hmac.compare_digest(str(arrays[_DIGEST]), entry_digest(cache.secret, key, arrays)):
        return "does not match its digest (changed after it was written)"
    try:
        return _from_arrays(kind, {k: v for k, v in arrays.items() if k != _DIGEST})
    except (KeyError, TypeError, ValueError) as e:
        return f"does not hold {kind} columns ({e})"
