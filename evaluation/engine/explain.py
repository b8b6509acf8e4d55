"""``explain``: which settings differ between two JSON results, in words.

``differences`` compares the fingerprint, the engine version and every key of the
two protocol records (``provenance.protocol_record``); ``effects`` says what each
difference does to the numbers. The CLI's ``explain`` and the compare page call it.
"""

from . import effects, json_file
from .errors import InputError


def _load(path):
    result = json_file.read(path, "a JSON result")
    if not isinstance(result, dict) or not isinstance(result.get("protocol_record"), dict):
        raise InputError(
            path,
            "no protocol record (results written before the engine recorded one lack it: "
            "score again with 'score --format json')",
            field="protocol_record",
        )
    return result


def differences(a, b):
    """``[(setting, value in a, value in b, effect)]`` between two results."""
    out = []
    if not _same(a.get("truth_fingerprint"), b.get("truth_fingerprint")):
        effect = "different ground truth: the numbers are about different data"
        for version, what in FINGERPRINT_CHANGES:
            if _fingerprint_since(a, version) != _fingerprint_since(b, version):
                effect += f", or the same split {what}"
        out.append(("ground truth", a.get("truth_fingerprint"), b.get("truth_fingerprint"), effect))
    if not _same(a.get("engine_version"), b.get("engine_version")):
        out.append(
            (
                "engine version",
                a.get("engine_version"),
                b.get("engine_version"),
                "computed by different engine versions; any number may differ",
            )
        )
    ra, rb = a["protocol_record"], b["protocol_record"]
    for key in sorted(set(ra) | set(rb), key=effects.order):
        if not _same(ra.get(key), rb.get(key)):
            out.append((key, ra.get(key), rb.get(key), effects.effect(key, ra, rb)))
    ta, tb = _score_cut(a), _score_cut(b)
    if ta is not None and tb is not None and not _same(ta, tb):  # (a level result has none)
        out.append(("score threshold", ta, tb, SCORE_CUT_EFFECT))
    return out


SCORE_CUT_EFFECT = (
    "the operating point's score cut (--threshold): precision, recall and F1 at the "
    "threshold (at_threshold, pooled and per class) differ; AP, recall at the cap, the "
    "curves and best F1 do not read it"
)


def _score_cut(result):
    """The score cut a result's ``at_threshold`` was read at (None where it has none:
    level protocols, results from before it was recorded, a hand-edited file)."""
    at = result.get("at_threshold")
    return at.get("threshold") if isinstance(at, dict) else None


#: The first engine whose fingerprint hashes the type of ids that are not numbers
#: (``GroundTruth.content_hash``, scheme ``typed``): a split of numeric ids has one
#: fingerprint under every engine, one of text ids another from this version on.
TYPED_FINGERPRINT = "2.15.0"
#: The first engine whose fingerprint (scheme ``named``) hashes the categories' own
#: names where they are shown otherwise (categories sharing a name).
NAMED_FINGERPRINT = "2.17.6"
#: The first engine whose fingerprint (scheme ``heights``) hashes annotations' own
#: ``height`` keys where one differs from its box's h (``miss-rate-cityscale`` reads them).
HEIGHTS_FINGERPRINT = "2.18.2"
#: The first engine whose fingerprint (scheme ``repeats``) hashes the annotations of a
#: repeated id as given (the VOC, KITTI and toolbox readings score them).
REPEATS_FINGERPRINT = "2.22.0"
#: The first engine whose fingerprint (scheme ``corners``) hashes a corner file's
#: corners as read where one says more than its xywh (voc, voc07 and kitti2d read them).
CORNERS_FINGERPRINT = "2.23.0"
#: ``(version, the splits whose fingerprint changed then)``, oldest first.
FINGERPRINT_CHANGES = (
    (
        TYPED_FINGERPRINT,
        "whose ids are not all numbers, fingerprinted by an engine before "
        f"{TYPED_FINGERPRINT} (ids hashed by their text, not their type)",
    ),
    (
        NAMED_FINGERPRINT,
        "whose categories share a name, fingerprinted by an engine before "
        f"{NAMED_FINGERPRINT} (shown names hashed, not the categories' own)",
    ),
    (
        HEIGHTS_FINGERPRINT,
        "whose annotations give height keys other than their boxes' h, fingerprinted by "
        f"an engine before {HEIGHTS_FINGERPRINT} (height keys not hashed)",
    ),
    (
        REPEATS_FINGERPRINT,
        "whose annotation ids repeat, fingerprinted by an engine before "
        f"{REPEATS_FINGERPRINT} (the annotations a later one with their id replaces "
        "not hashed)",
    ),
    (
        CORNERS_FINGERPRINT,
        "given as corners (VOC XML, CSV, KITTI) where some x1 + w is not the x2 read, "
        f"fingerprinted by an engine before {CORNERS_FINGERPRINT} (the corners as read "
        "not hashed)",
    ),
)


def _fingerprint_since(result, since):
    """Whether ``result``'s fingerprint is of engine ``since`` or later (True for an
    unreadable version: only a version known to be older says it is not)."""
    try:
        version = tuple(int(part) for part in str(result.get("engine_version")).split("."))
    except ValueError:
        return True
    return version >= tuple(int(part) for part in since.split("."))


def _same(a, b):
    """``a == b`` for JSON values, except that NaN equals NaN: a file read twice (a NaN
    setting reads back as nan, and nan != nan) never differs from itself. Iterative:
    a value nested as deep as ``json`` reads is compared too."""
    pending = [(a, b)]
    while pending:
        a, b = pending.pop()
        if isinstance(a, dict) and isinstance(b, dict):
            if a.keys() != b.keys():
                return False
            pending.extend((a[k], b[k]) for k in a)
        elif isinstance(a, list) and isinstance(b, list):
            if len(a) != len(b):
                return False
            pending.extend(zip(a, b))
        elif not (a == b or (isinstance(a, float) and a != a and isinstance(b, float) and b != b)):
            return False
    return True


def _short(value, limit=70):
    text = repr(value) if not isinstance(value, str) else value
    return text if len(text) <= limit else text[: limit - 1] + "…"


def explain(path_a, path_b):
    """The text of ``explain``: every differing setting, both values, its effect."""
    a, b = _load(path_a), _load(path_b)
    found = differences(a, b)
    if not found:
        return "The two results were computed under the same protocol, engine and ground truth."
    lines = [f"{len(found)} setting(s) differ between {path_a} (A) and {path_b} (B):"]
    for key, value_a, value_b, effect in found:
        lines += [
            "",
            f"* {key.replace('_', ' ')}",
            f"    A: {_short(value_a)}",
            f"    B: {_short(value_b)}",
            f"    {effect}.",
        ]
    # a JSON string may hold a lone surrogate (valid JSON, not encodable text): shown
    # as its escape, so the text can be printed and written
    return "\n".join(lines).encode("utf-8", "backslashreplace").decode("utf-8")
