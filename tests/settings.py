"""Settings of the test run: the project's own, with a throw-away ``SECRET_KEY``.

``benchbook.settings`` refuses to start without one unless ``DEBUG`` is on. The key is
put in the environment, so worker and server processes a test starts inherit it.
"""

import os
import secrets

os.environ.setdefault("SECRET_KEY", "tests-" + secrets.token_urlsafe(32))

from benchbook.settings import *  # noqa: E402, F403
