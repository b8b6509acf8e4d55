# The platform fixtures (users, team, detector, split, run_tasks, worker) serve here too.
from tests.platform.conftest import *  # noqa: F403
from tests.platform.test_worker import worker  # noqa: F401
