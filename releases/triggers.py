"""Database triggers that make the audit trail, judgements and decisions append-only.

UPDATE and DELETE are refused row by row, TRUNCATE by a statement trigger (PostgreSQL;
SQLite has no TRUNCATE). Installed by this app's trigger migrations and again after every
``migrate`` (see ``apps.py``). ``evaluation.triggers`` does the same for results.
"""

from evaluation.triggers import (
    execute,
    existing,
    postgres_append_only,
    postgres_refuse_function,
    postgres_remove,
    sqlite_append_only,
    sqlite_remove,
)

TABLE = "releases_auditevent"
APPEND_ONLY = {
    TABLE: "the audit trail",
    "releases_signoff": "a release decision",
    "releases_judgement": "a judgement",
    "releases_outcome": "an outcome of a judgement",
}
FUNCTION = "benchbook_refuse_release_change"
# Names of migration 0003 (the audit trail alone), replaced by the ones above.
_LEGACY_POSTGRES = f"""
DROP TRIGGER IF EXISTS benchbook_append_only ON {TABLE};
DROP FUNCTION IF EXISTS benchbook_refuse_audit_change();
"""
_LEGACY_SQLITE = [
    f"DROP TRIGGER IF EXISTS benchbook_append_only_{op}" for op in ("update", "delete")
]


def install(connection):
    """Install (or re-install: idempotent) every trigger of this app on the tables that
    exist."""
    tables = existing(connection, APPEND_ONLY)
    postgres = [postgres_refuse_function(FUNCTION)]
    sqlite = []
    if TABLE in tables:
        postgres.append(_LEGACY_POSTGRES)
        sqlite += _LEGACY_SQLITE
    for table in tables:
        postgres.append(postgres_append_only(table, APPEND_ONLY[table], FUNCTION))
        sqlite += sqlite_append_only(table, APPEND_ONLY[table])
    execute(connection, {"postgresql": postgres, "sqlite": sqlite})


def remove(connection):
    tables = existing(connection, APPEND_ONLY)
    postgres = [postgres_remove(t) for t in tables] + [f"DROP FUNCTION IF EXISTS {FUNCTION}();"]
    if TABLE in tables:
        postgres.append(_LEGACY_POSTGRES)
    sqlite = [s for t in APPEND_ONLY for s in sqlite_remove(t)] + _LEGACY_SQLITE
    execute(connection, {"postgresql": postgres, "sqlite": sqlite})


def protected_tables():
    return list(APPEND_ONLY)
