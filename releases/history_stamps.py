"""What keeps the history reads fast without ever serving stale numbers.

A detector's history chart reads one ``ClassScore`` (or level) value per version and
split through six joined tables: at 1,000 versions x 5 splits that join is most of a
read. Its result changes only when a prediction set of the detector is created,
replaced or linked to evaluations (``services.request_for_set``: uploads, replacements,
re-scores, a suite's new protocol) or when an evaluation of its sets finishes (the
result's transaction, ``signals.result_recorded``). Each of those inserts a
``HistoryChange`` row in its own transaction (``changed``); the read takes the stamp —
count and newest id of the detector's rows — *before* it reads the numbers, and keeps
them in this process under that stamp (``cached``). So:

* a change committed before the stamp is read is in the numbers (read after it);
* a change committed after the stamp was read may or may not be in them, but the next
  read sees a larger count and reads again: a cached entry is never older than its
  stamp (rows are only inserted, so a count never comes back).

Every worker process of the web server keeps its own entries (a bounded LRU); the stamp
lives in the database, so processes never disagree about what is current.
"""

from collections import OrderedDict
from threading import Lock

from django.db.models import Count, Max

ENTRIES = 256  # per process; one entry is one selection's numbers (~5,000 at 1,000 x 5)

_cache = OrderedDict()
_lock = Lock()


def changed(detector_ids):
    """Record a change to the history of these detectors (inside the caller's
    transaction: rolled back with it)."""
    from .models import HistoryChange

    HistoryChange.objects.bulk_create(HistoryChange(detector_id=pk) for pk in set(detector_ids))


def changed_by_evaluation(evaluation_id):
    """An evaluation finished: the detectors whose prediction sets link it changed."""
    from .models import Detector

    detectors = Detector.objects.filter(versions__prediction_sets__evaluations=evaluation_id)
    changed(detectors.values_list("pk", flat=True).distinct())


def stamp(detector_id):
    """(count, newest id) of the detector's changes, in one query."""
    from .models import HistoryChange

    found = HistoryChange.objects.filter(detector_id=detector_id).aggregate(
        count=Count("id"), newest=Max("id")
    )
    return found["count"], found["newest"]


def cached(detector_id, key, compute):
    """``compute()`` for this selection ``key`` of the detector's history, or the value
    computed earlier in this process under the current stamp (read first)."""
    full = (detector_id, stamp(detector_id), key)
    with _lock:
        if full in _cache:
            _cache.move_to_end(full)
            return _cache[full]
    value = compute()
    with _lock:
        _cache[full] = value
        while len(_cache) > ENTRIES:
            _cache.popitem(last=False)
    return value


def clear():
    """Forget every cached entry of this process (tests)."""
    with _lock:
        _cache.clear()
