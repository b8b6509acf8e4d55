"""A frozen split's identity: its content hash, and the twin check of an upload.

``BenchmarkSplit.sha256`` is the split's content hash under its ``hash_scheme``
(``engine.GroundTruth.content_hash``, ``engine.HASH_SCHEMES``): ``corners`` for splits
frozen since a corner file's corners as read entered the hash (``services.HASH_SCHEME``,
migration 0028), ``repeats`` since the annotations of a repeated id as given did
(0027), ``heights`` since height keys did (0026),
``named`` since the categories' own names did (0025), ``typed`` since id kinds did,
``untyped`` for splits frozen before (migration 0024); a hash is never rewritten. Each
scheme hashes a split as the older ones do unless it holds what the newer one tells
apart (ids that are not numbers; categories sharing a name; height keys; repeated
annotation ids; corners as read).
"""

from . import engine
from .engine.content_hash import HASH_SCHEMES
from .engine.data import REPEATED_GIVEN
from .models import BenchmarkSplit

#: What each scheme after ``untyped`` added, for a refusal naming a split frozen before.
_ADDED = {
    "typed": "id types",
    "named": "categories' own names",
    "heights": "height keys",
    "repeats": "the annotations of a repeated id as given",
    "corners": "corners as read",
}


def split_hash(split, truth):
    """``truth``'s content hash under the scheme ``split`` was frozen with (a historical
    model of a migration before ``hash_scheme`` existed: ``untyped``, 0024's default)."""
    return truth.content_hash(getattr(split, "hash_scheme", "untyped"))


def twin_refusal(loaded, sha, scheme, read):
    """Why ``loaded`` (content hash ``sha`` under ``scheme``) cannot be frozen: a frozen
    split holds its content, or its fingerprint; None if neither. ``read(split)``: a
    stored split's ground truth as frozen.

    A split frozen under an older scheme (``typed``, ``untyped``) has as sha256 that
    scheme's hash of this content when it holds this content or content that scheme
    does not tell apart from it (ids of another kind, categories named otherwise): it
    is read (checked against its hash) and is this content's twin only if its hash
    under ``scheme`` is ``sha``. One that is other content but whose fingerprint still
    equals ``sha`` (this content holds nothing the newer scheme adds: its hash is the
    older one) keeps this content from being frozen under that fingerprint, which names
    the split on every result and must be unique."""
    twin = BenchmarkSplit.objects.filter(sha256=sha).first()
    if twin is not None:
        if twin.hash_scheme == scheme:
            return f"the same content is already frozen as {twin}"
        theirs = _as_frozen(twin, read)
        if theirs is None:
            return _unreadable(twin)
        if theirs.content_hash(scheme) == sha:
            return f"the same content is already frozen as {twin}"
        return _fingerprint_taken(twin, theirs, loaded)
    for older in HASH_SCHEMES[HASH_SCHEMES.index(scheme) + 1 :]:
        theirs_sha = loaded.content_hash(older)
        if theirs_sha == sha:  # such a row would have been found above
            continue
        for twin in BenchmarkSplit.objects.filter(sha256=theirs_sha, hash_scheme=older):
            theirs = _as_frozen(twin, read)
            if theirs is None:
                return _unreadable(twin)
            if theirs.content_hash(scheme) == sha:
                return f"the same content is already frozen as {twin}"
    return None


def _fingerprint_taken(twin, theirs, loaded):
    """The refusal of content whose fingerprint a frozen split of other content holds
    (frozen under an older scheme, which did not tell the two apart): what differs."""
    differs = []
    kinds = theirs.id_kinds()
    if kinds != loaded.id_kinds():
        shown = ", ".join(f"{family} ids {kind}" for family, kind in sorted(kinds.items()))
        differs.append(("typed", f"whose ids are of another type ({shown})"))
    if theirs.category_names != loaded.category_names:
        names = ", ".join(repr(name) for name in theirs.category_names)
        differs.append(("named", f"whose categories are named otherwise ({names})"))
    if theirs._height_says_more() or loaded._height_says_more():
        differs.append(("heights", "whose annotations' own height keys differ"))
    if _repeats_given(theirs) or _repeats_given(loaded):
        differs.append(
            (
                "repeats",
                "whose annotations under a repeated id, read as given by voc, "
                "voc07, kitti2d and the toolbox's miss rates, differ",
            )
        )
    if theirs._corners_say_more() or loaded._corners_say_more():
        differs.append(
            (
                "corners",
                "whose corners as read (some x1 + w is not the x2 given), which voc, "
                "voc07 and kitti2d measure overlap on, differ",
            )
        )
    if not differs:  # another difference an older scheme missed: none known
        differs.append(("named", "which holds other content"))
    return (
        f"its content hash is that of {twin}, frozen before {_ADDED[differs[0][0]]} "
        f"entered the hash, {'; '.join(what for _, what in differs)}: the hash would not "
        "tell the two splits apart"
    )


def _repeats_given(truth):
    """Whether ``truth`` holds annotations of a repeated id as given (what ``repeats``
    hashes beyond ``heights``)."""
    return truth.repeated is not None and bool((truth.repeated == REPEATED_GIVEN).any())


def _as_frozen(split, read):
    """A frozen split's ground truth as read from its files, or None where they cannot
    be read or no longer hold the content it was frozen with."""
    try:
        truth = read(split)
    except (OSError, ValueError, engine.InputError):
        return None
    return truth if split_hash(split, truth) == split.sha256 else None


def _unreadable(split):
    return (
        f"its content may already be frozen as {split}, whose files cannot be read to "
        "compare their content"
    )
