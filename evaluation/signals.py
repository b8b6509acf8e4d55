"""What ``evaluation`` tells the rest of Benchbook.

``releases`` connects receivers in its ``AppConfig.ready()``; this app never imports it.
``result_recorded`` is sent *inside* the transaction that ends an evaluation (done or
failed), after its rows are written: what a receiver writes commits with the result or
not at all (the audit event with the result's digests). The others are sent after the
commit.
"""

from django.dispatch import Signal

split_frozen = Signal()  # split
result_recorded = Signal()  # evaluation (done or failed), inside its transaction
evaluation_finished = Signal()  # evaluation
evaluation_failed = Signal()  # evaluation
content_mismatch = Signal()  # subject ("split:3"), error (storage.ContentMismatch)
