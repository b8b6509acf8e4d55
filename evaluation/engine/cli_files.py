"""The files the command line writes (``python -m evaluation.engine score``):
``--records`` and ``--records-out`` checked before any scoring (``outputs``), then
written all or none (``write_all``); the ``--cache`` folder (``cache_folder``). Every
refusal is an ``InputError`` naming the path and the option."""

import contextlib
import os

from .errors import InputError


def outputs(inputs, wanted):
    """``{option: path}`` of the files ``wanted`` (``(option, path or None)`` pairs:
    ``--records``, ``--records-out``) will write, checked before any scoring: a file
    name in an existing folder, not an input (``inputs``: ``(option, path or None)``
    pairs), nor a file inside an input folder, and not the other output."""
    paths = {}
    for option, path in wanted:
        if not path:
            continue
        folder = os.path.dirname(os.path.abspath(path))
        if os.path.isdir(path):
            raise InputError(path, f"is a folder: {option} names the file to write")
        if not os.path.isdir(folder):
            raise InputError(path, f"cannot be written ({option}): there is no folder {folder}")
        for other, given in inputs:
            if given and _same_file(path, given):
                raise InputError(
                    path, f"is the {other} input: {option} would overwrite it; write elsewhere"
                )
            if other in LABEL_INPUTS and given and os.path.isdir(given) and _inside(path, given):
                raise InputError(
                    path,
                    f"is inside the folder given as {other}: {option} would change that "
                    "input; write elsewhere",
                )
        for earlier_option, earlier in paths.items():
            if _same_file(path, earlier):
                raise InputError(
                    path, f"is named by both {earlier_option} and {option}: each writes a file"
                )
        paths[option] = path
    return paths


#: The inputs that may be folders (of label files).
LABEL_INPUTS = ("--truth", "--predictions")


def _same_file(a, b):
    """One file (``os.path.samefile``: links and hard links too) or one resolved path."""
    try:
        if os.path.exists(a) and os.path.exists(b):
            return os.path.samefile(a, b)
    except OSError:
        pass
    return os.path.realpath(a) == os.path.realpath(b)


def _inside(path, folder):
    real, root = os.path.realpath(path), os.path.realpath(folder)
    return os.path.commonpath([real, root]) == root


def write_all(writes):
    """Write each file (``{path: (option, write(path to write))}``) next to its place
    under a temporary name, then move all into place: a failure (disk full, no
    permission) leaves none of them, and no part of one, behind. A symbolic link is
    written through (its target replaced); a device or a pipe (``/dev/stdout``) is
    written in place, never replaced."""
    done = {}
    try:
        for path, (_, write) in writes.items():
            real = os.path.realpath(path)
            if os.path.exists(real) and not os.path.isfile(real):
                write(real)
                continue
            folder, name = os.path.split(real)
            done[path] = (real, os.path.join(folder, f".{name}.{os.getpid()}.partial"))
            write(done[path][1])
        for path, (real, temporary) in list(done.items()):
            os.replace(temporary, real)
            del done[path]
    except OSError as e:
        option = writes[path][0]
        raise InputError(path, f"cannot be written ({option}): {e.strerror}") from None
    finally:
        for _, temporary in done.values():
            with contextlib.suppress(OSError):
                os.remove(temporary)


def cache_folder(path):
    """The ``--cache`` folder, created if absent."""
    if os.path.exists(path) and not os.path.isdir(path):
        raise InputError(path, "is not a folder: --cache names the folder to keep parsed input in")
    try:
        os.makedirs(path, exist_ok=True)
    except OSError as e:
        raise InputError(path, f"cannot be the cache folder (--cache): {e.strerror}") from None
