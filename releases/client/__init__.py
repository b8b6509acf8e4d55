"""Benchbook's client for training pipelines: ``python -m releases.client``.

It needs only the Python standard library and HTTP access to a Benchbook server (no
Django, no project code), so it can be copied to or installed on any build machine.

Exit codes follow the verdict: 0 only for ``pass`` (or when the detector has no
release criteria, printed as such); 3 for ``regression`` or ``incomplete`` (what is
missing or failing is printed); 2 bad input (the server's message, or an evaluation
that failed on the uploaded file, is printed); 1 any other failure (unreachable, 5xx,
timeout).
"""

OK, FAILURE, BAD_INPUT, REGRESSION = 0, 1, 2, 3
