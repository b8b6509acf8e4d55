"""A columnar cache of parsed input: ``<cache_dir>/<sha256>.npz``.

The key is the SHA-256 of the source bytes plus the loading options, so a changed
file or option is a different entry; an entry is written atomically (temp + rename).
"""

import dataclasses
import hashlib
import json
import os
import tempfile

import numpy as np

from ..data import GroundTruth, Predictions

_TYPES = {"truth": GroundTruth, "predictions": Predictions}
_BLOCK = 1 << 20


def file_sha256(path):
    """SHA-256 of a file's bytes; of a folder, of its files' names and digests."""
    if os.path.isdir(path):
        return _folder_sha256(path)
    digest = hashlib.sha256()
    with open(path, "rb") as f:
        while block := f.read(_BLOCK):
            digest.update(block)
    return digest.hexdigest()


def _folder_sha256(path):
    digest = hashlib.sha256(b"folder")
    for folder, dirs, files in sorted(os.walk(path)):
        dirs.sort()
        for name in sorted(files):
            full = os.path.join(folder, name)
            relative = os.path.relpath(full, path).replace(os.sep, "/")
            digest.update(f"{relative}\0{file_sha256(full)}\n".encode())
    return digest.hexdigest()


def cache_key(sources, options):
    digest = hashlib.sha256(json.dumps(options, sort_keys=True).encode())
    for path in sources:
        digest.update(file_sha256(path).encode())
    return digest.hexdigest()


def _to_arrays(obj):
    arrays, meta = {}, {}
    for f in dataclasses.fields(obj):
        value = getattr(obj, f.name)
        if isinstance(value, np.ndarray):
            arrays[f.name] = value.astype(str) if value.dtype == object else value
        elif f.name == "image_tags":
            meta[f.name] = [list(t) for t in value]
        elif isinstance(value, tuple):
            meta[f.name] = list(value)
        else:
            meta[f.name] = value
    arrays["__meta__"] = np.array(json.dumps(meta))
    return arrays


def _from_arrays(kind, data):
    meta = json.loads(str(data["__meta__"]))
    values = {name: data[name] for name in data.files if name != "__meta__"}
    for name, value in meta.items():
        if name == "image_tags":
            value = tuple(tuple(t) for t in value)
        elif isinstance(value, list):
            value = tuple(value)
        values[name] = value
    return _TYPES[kind](**values)


def cached(cache_dir, sources, options, build, kind):
    """``build()`` once per distinct input; later calls load the stored columns."""
    if cache_dir is None:
        return build()
    os.makedirs(cache_dir, exist_ok=True)
    path = os.path.join(cache_dir, cache_key(sources, options) + ".npz")
    if os.path.exists(path):
        with np.load(path, allow_pickle=False) as data:
            return _from_arrays(kind, data)
    obj = build()
    fd, tmp = tempfile.mkstemp(dir=cache_dir, suffix=".npz")
    with os.fdopen(fd, "wb") as f:
        np.savez(f, **_to_arrays(obj))
    os.replace(tmp, path)
    return obj
