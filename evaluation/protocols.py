"""Protocols by name for the platform: the engine's presets, and custom protocols stored
once under their own name (``StoredProtocol``, append-only). Every place that turns an
evaluation's ``protocol`` column into the engine's ``Protocol`` calls ``resolve``."""

import hashlib
import json
import re

from . import engine
from .levels import LEVEL_PROTOCOLS
from .models import StoredProtocol

NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,31}")


def canonical(definition):
    return json.dumps(definition, sort_keys=True, separators=(",", ":"))


def digest(definition):
    return hashlib.sha256(canonical(definition).encode()).hexdigest()


def resolve(name):
    """The engine ``Protocol`` a name stands for: a preset, else a stored custom
    protocol; a level protocol's name (``levels.LEVEL_PROTOCOLS``, e.g. ``kitti2d``)
    gives its ``levels.LevelProtocol`` (never a primary protocol, so never read as a
    ``Protocol``); ``engine.InputError`` (field ``protocol``) when it is none of these."""
    if name in engine.PRESETS:
        return engine.get_protocol(name)
    if name in LEVEL_PROTOCOLS:
        return LEVEL_PROTOCOLS[name]
    stored = StoredProtocol.objects.filter(name=name).first()
    if stored is None:
        known = ", ".join([*sorted(engine.PRESETS), *LEVEL_PROTOCOLS, *stored_names()])
        raise engine.InputError("protocol", f"unknown protocol {name!r}; known: {known}")
    return engine.protocol_from_dict(stored.definition, source=f"protocol {name}")


def stored_names():
    return list(StoredProtocol.objects.order_by("name").values_list("name", flat=True))


def check_definition(definition, source):
    """A custom protocol's definition, validated by the engine (``InputError`` naming
    the field; the engine also refuses a preset's name, level presets' included); its
    name must be new, or already stored with this very definition."""
    protocol = engine.protocol_from_dict(definition, source=source)
    if not NAME.fullmatch(protocol.name):
        raise engine.InputError(
            source,
            "a name of 1 to 32 letters, digits, '.', '_' or '-', starting with a letter or digit",
            field="name",
        )
    stored = StoredProtocol.objects.filter(name=protocol.name).first()
    if stored is not None and stored.sha256 != digest(definition):
        raise engine.InputError(
            source,
            f"{protocol.name!r} is already stored with another definition; a changed "
            "protocol needs a new name (evaluations under the old one keep their meaning)",
            field="name",
        )
    return protocol


def store(definition, created_by=""):
    """Store a checked definition under its name (the same definition again: the same
    row). Call inside the transaction that uses it."""
    stored, _ = StoredProtocol.objects.get_or_create(
        name=definition["name"],
        defaults={
            "definition": definition,
            "sha256": digest(definition),
            "created_by": created_by,
        },
    )
    return stored


def definitions(names):
    """{name: definition} of the stored custom protocols among ``names``."""
    rows = StoredProtocol.objects.filter(name__in=[n for n in names if n not in engine.PRESETS])
    return {row.name: row.definition for row in rows}


def not_primary(name):
    """Why ``name`` cannot be a suite's primary (first) protocol, or None: a level
    protocol has no match records for the cause pages, deployed thresholds and
    bootstrap intervals that read the primary one."""
    if name in LEVEL_PROTOCOLS:
        return (
            f"{name!r} gives results per difficulty level and cannot be the primary "
            "protocol; name a matching protocol first (e.g. coco) and list it after"
        )
    return None
