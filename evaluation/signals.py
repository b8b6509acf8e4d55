"""What ``evaluation`` tells the rest of Benchbook (sent after the commit).

``releases`` connects receivers in its ``AppConfig.ready()``; this app never imports it.
"""

from django.dispatch import Signal

split_frozen = Signal()  # split
evaluation_finished = Signal()  # evaluation
evaluation_failed = Signal()  # evaluation
content_mismatch = Signal()  # subject ("split:3"), error (storage.ContentMismatch)
