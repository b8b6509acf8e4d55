"""Benchbook's client for training pipelines: ``python -m releases.client``.

It needs only the Python standard library and HTTP access to a Benchbook server (no
Django, no project code), so it can be copied to or installed on any build machine.

Exit codes: 0 no regression, 3 regression by the release criteria, 2 bad input
(the server's message is printed), 1 any other failure (unreachable, 5xx, timeout).
"""

OK, FAILURE, BAD_INPUT, REGRESSION = 0, 1, 2, 3
