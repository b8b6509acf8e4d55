"""What a server process does before its first request, so no request pays for it: the
URL configuration (every view and what the views import) and its reverse table, the
engine modules the cause pages call lazily (numpy, the per-image leave-one-out,
reasons, export, TIDE, confusion) and the cause pages' compiled templates. Only what is
cheap (about 0.03 s of CPU beyond the imports): no records file is read here — a
process reads and hash-checks one when a request first needs it. Called by
``wsgi.py``; commands and the worker do not need it."""

import importlib

#: Modules imported inside functions on a request path (kept lazy elsewhere).
LAZY_MODULES = (
    "numpy",
    "evaluation.engine",
    "evaluation.engine.npz_view",
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

#: Templates of the pages from a flag to its cause, compiled once per process (with
#: the cached template loader, Django's default when DEBUG is off).
TEMPLATES = (
    "frontend/version.html",
    "frontend/images.html",
    "frontend/image.html",
    "frontend/confusion.html",
    "frontend/compare.html",
)


def warm():
    """Import the URL configuration and ``LAZY_MODULES``, build the URL reverse table
    and compile ``TEMPLATES``; returns the module names."""
    from django.template.loader import get_template
    from django.urls import get_resolver

    resolver = get_resolver()
    resolver.url_patterns  # noqa: B018 — imports every view module
    resolver.reverse_dict  # noqa: B018 — the table every page's {% url %} reads
    for name in LAZY_MODULES:
        importlib.import_module(name)
    for name in TEMPLATES:
        get_template(name)
    return LAZY_MODULES
