"""A server process imports the views and the engine modules the cause pages use before
its first request (``benchbook.warm``, called by ``wsgi.py``)."""

import json
import os
import subprocess
import sys


def test_loading_the_wsgi_application_imports_what_a_first_request_would():
    """In a fresh interpreter, importing ``benchbook.wsgi`` leaves every module of
    ``warm.LAZY_MODULES`` and the per-image list's view module imported."""
    code = (
        "import json, sys\n"
        "import benchbook.wsgi\n"
        "from benchbook.warm import LAZY_MODULES\n"
        "names = [*LAZY_MODULES, 'frontend.views.images', 'releases.selectors.image_list']\n"
        "print(json.dumps({n: n in sys.modules for n in names}))\n"
    )
    env = {**os.environ, "DEBUG": "true", "DJANGO_SETTINGS_MODULE": "benchbook.settings"}
    found = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, env=env, check=True
    )
    imported = json.loads(found.stdout.strip().splitlines()[-1])
    assert imported and all(imported.values()), imported
