"""What a server process imports before its first request, so no request pays for it:
the URL configuration (every view and what the views import) and the engine modules the
cause pages call lazily (numpy, the per-image leave-one-out, reasons, export, TIDE,
confusion). Called by ``wsgi.py``; commands and the worker do not need it."""

import importlib

#: Modules imported inside functions on a request path (kept lazy elsewhere).
LAZY_MODULES = (
    "numpy",
    "evaluation.engine",
    "evaluation.engine.per_image",
    "evaluation.engine.loo_fast",
    "evaluation.engine.reasons",
    "evaluation.engine.export",
    "evaluation.engine.tide",
    "evaluation.engine.confusion",
    "evaluation.engine.bootstrap",
    "evaluation.image_loo",
    "evaluation.outcomes",
)


def warm():
    """Import the URL configuration and ``LAZY_MODULES``; returns their names."""
    from django.urls import get_resolver

    get_resolver().url_patterns  # noqa: B018 — imports every view module
    for name in LAZY_MODULES:
        importlib.import_module(name)
    return LAZY_MODULES
