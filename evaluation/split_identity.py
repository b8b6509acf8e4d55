"""A frozen split's identity: its content hash, and the twin check of an upload.

``BenchmarkSplit.sha256`` is the split's content hash under its ``hash_scheme``
(``engine.GroundTruth.content_hash``): ``typed`` for splits frozen since id kinds
entered the hash (``services.HASH_SCHEME``), ``untyped`` for splits frozen before
(migration 0024), whose hash is never rewritten. Numeric ids hash alike under both.
"""

from . import engine
from .models import BenchmarkSplit


def split_hash(split, truth):
    """``truth``'s content hash under the scheme ``split`` was frozen with (a historical
    model of a migration before ``hash_scheme`` existed: ``untyped``, 0024's default)."""
    return truth.content_hash(getattr(split, "hash_scheme", "untyped"))


def twin_refusal(loaded, sha, scheme, read):
    """Why ``loaded`` (content hash ``sha`` under ``scheme``) cannot be frozen: a frozen
    split holds its content, or its fingerprint; None if neither. ``read(split)``: a
    stored split's ground truth as frozen.

    A split frozen under the ``untyped`` scheme hashed its ids by their text, so its
    sha256 is the ``untyped`` hash of this content when it holds the same ids, of
    either kind: it is this content's twin only if its ids are of the same kinds (read
    from its files, checked against its hash). One whose ids are of another kind is
    other content (other detections match it); if its fingerprint still equals this
    content's (this one's ids are numbers: their typed hash is the untyped one), this
    content cannot be frozen under that fingerprint, which names the split on every
    result and must be unique."""
    twin = BenchmarkSplit.objects.filter(sha256=sha).first()
    if twin is not None:
        kinds = None if twin.hash_scheme == scheme else _kinds(twin, read)
        if twin.hash_scheme == scheme or kinds == loaded.id_kinds():
            return f"the same content is already frozen as {twin}"
        if kinds is None:
            return _unreadable(twin)
        shown = ", ".join(f"{family} ids {kind}" for family, kind in sorted(kinds.items()))
        return (
            f"its content hash is that of {twin}, frozen before id types entered the hash, "
            f"whose ids are of another type ({shown}): the hash would not tell the two "
            "splits apart"
        )
    untyped = loaded.content_hash("untyped")
    if untyped == sha:
        return None
    for twin in BenchmarkSplit.objects.filter(sha256=untyped, hash_scheme="untyped"):
        kinds = _kinds(twin, read)
        if kinds is None:
            return _unreadable(twin)
        if kinds == loaded.id_kinds():
            return f"the same content is already frozen as {twin}"
    return None


def _kinds(split, read):
    """The id kinds of a frozen split's content (``GroundTruth.id_kinds``), or None
    where its files cannot be read or no longer hold the content it was frozen with."""
    try:
        truth = read(split)
    except (OSError, ValueError, engine.InputError):
        return None
    return truth.id_kinds() if split_hash(split, truth) == split.sha256 else None


def _unreadable(split):
    return (
        f"its content may already be frozen as {split}, whose files cannot be read to "
        "compare their id types"
    )
