"""The change rows whose count and newest id key a detector's cached history numbers."""

from django.db import models


class HistoryChange(models.Model):
    """One change to what a detector's history reads (a prediction set created,
    replaced or linked to evaluations, an evaluation of its sets finished), inserted in
    the change's own transaction by ``releases.history_stamps.changed``. Rows are only
    added: their count and newest id per detector are the stamp that keys the cached
    history numbers. A plain id, not a foreign key: the insert then locks no detector
    row (a foreign key check would wait for ``suites.set_suite``'s lock on it while
    holding the audit chain's lock that ``set_suite`` waits for)."""

    detector_id = models.BigIntegerField(db_index=True)

    def __str__(self):
        return f"history change {self.pk} of detector {self.detector_id}"
