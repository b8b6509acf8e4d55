"""How the platform reads what it is given: the engine options every load uses (ids,
input policies, the ``vis_ratio`` reading and hash scheme of new splits), the upload
size limit, an upload's format, and the errors a refused request raises.
"""

from django.conf import settings

from .. import engine

#: The ids the platform reads (``engine.load_truth``/``load_predictions(ids=)``): any
#: id pycocotools 2.0.11 accepts, as it orders and matches them. Every entry point
#: reaches the engine through the loads here; pages, URLs and downloads never hold an
#: id as a number (images are routed by their index in the split, ids shown as the
#: engine's text), so no stricter reading is offered.
ENGINE_IDS = "any"
#: How a split's annotations are read (``engine.load_truth(annotations=)``): the
#: default is pycocotools' reading, counted; ``strict`` refuses such files.
ANNOTATION_POLICIES = ("reference", "strict")
#: How a new split reads an annotation's ``vis_ratio`` key (``engine.load_truth
#: (vis_ratio=)``): as the city-scale evaluation script does (``as-given``: any number
#: or boolean, winning beside a ``visibility``, for miss-rate-cityscale). A stored split
#: keeps the reading it was frozen with (``BenchmarkSplit.vis_ratio_reading``:
#: migration 0022 set ``unread`` on splits frozen before the key was read, 0023 keeps
#: ``read`` on those frozen with engines 2.9-2.10), so its content hash still matches.
VIS_RATIO_READING = "as-given"
#: How a new split's content hash is taken (``engine.GroundTruth.content_hash(scheme)``):
#: ids that are not numbers hash with their kind, categories sharing a name with their
#: own names, annotations' own height keys, and each annotation whose id a later one
#: repeats as given (read so by voc, voc07, kitti2d and the toolbox's miss rates), and
#: a corner file's corners as read where one says more than its xywh (voc, voc07 and
#: kitti2d measure overlap on them). A stored split is verified with the scheme it was frozen with
#: (``BenchmarkSplit.hash_scheme``: migration 0024 set ``untyped`` on splits frozen
#: before id kinds were hashed, 0025 keeps ``typed`` on those frozen before own names
#: were, 0026 keeps ``named`` on those frozen before ``height`` keys were, 0027 keeps
#: ``heights`` on those frozen before the annotations of a repeated id as given were,
#: 0028 keeps ``repeats`` on those frozen before corners as read were), so its sha256
#: is never rewritten.
HASH_SCHEME = "corners"
#: Detections of classes the split does not list (``engine.load_predictions
#: (unknown_classes=)``): the default drops them as pycocotools does, counted and named
#: in the result; ``reject`` refuses the file.
UNKNOWN_CLASS_POLICIES = ("drop", "reject")


def input_policy(*, annotations=None, unknown_classes=None):
    """The one decision of how the platform reads what a reference implementation
    accepts: the engine options for a split load (``annotations``) or a predictions
    load (``unknown_classes``). None (not given) is the reference behaviour — the
    annotations pycocotools 2.0.11 scores (``COCOeval._prepare`` walks ``getImgIds()``
    and ``getCatIds()`` only; a repeated id resolves to its last annotation in
    ``COCO.createIndex``) and detections of unlisted classes kept out, as ``evaluate``
    never looks at them; the stricter policy is the user's pick. Every entry point
    (page, API, client, commands, worker, re-score, pieces) reaches the engine through
    this; an unknown value is an ``UploadError`` naming the setting. Returns
    ``{"annotations": ..., "unknown_classes": ...}``. Detections of
    images the split lacks stay refused on upload (``loadRes`` asserts "Results do not
    correspond to current coco set"): that is ``unknown_images``, not decided here.
    """
    policy = {
        "annotations": annotations or "reference",
        "unknown_classes": unknown_classes or "drop",
    }
    for setting, allowed in (
        ("annotations", ANNOTATION_POLICIES),
        ("unknown_classes", UNKNOWN_CLASS_POLICIES),
    ):
        if policy[setting] not in allowed:
            raise UploadError(
                f"{setting}: unknown policy {policy[setting]!r}; use {' or '.join(allowed)}",
                path=setting,
            )
    return policy


class UploadError(ValueError):
    """A request the platform refuses; the message says what and where.

    ``path`` optionally names the request field at fault (``"rules[2].threshold"``),
    for API error bodies.
    """

    def __init__(self, message, *, path=""):
        super().__init__(message)
        self.path = path


class UploadConflict(UploadError):
    """A request refused because of the present state of what it changes (HTTP 409)."""


def _limit():
    return settings.BENCHBOOK_MAX_UPLOAD_BYTES


def _format_of(name, path=None):
    """The engine format of an upload: a zip (by content) is a KITTI, YOLO or VOC
    label archive, detected by the engine; otherwise the name says CSV or JSON."""
    if path is not None and engine.is_collection(path):
        return engine.detect_format(path)
    return "csv" if name.lower().endswith(".csv") else "json"
