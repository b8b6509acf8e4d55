"""Database triggers that make the audit trail append-only (PostgreSQL and SQLite)."""

from evaluation.triggers import execute

TABLE = "releases_auditevent"

POSTGRES_INSTALL = f"""
CREATE OR REPLACE FUNCTION benchbook_refuse_audit_change() RETURNS trigger AS $$
BEGIN
    RAISE EXCEPTION 'the audit trail is append-only' USING ERRCODE = 'restrict_violation';
END;
$$ LANGUAGE plpgsql;
DROP TRIGGER IF EXISTS benchbook_append_only ON {TABLE};
CREATE TRIGGER benchbook_append_only BEFORE UPDATE OR DELETE ON {TABLE}
    FOR EACH ROW EXECUTE FUNCTION benchbook_refuse_audit_change();
"""
POSTGRES_REMOVE = f"""
DROP TRIGGER IF EXISTS benchbook_append_only ON {TABLE};
DROP FUNCTION IF EXISTS benchbook_refuse_audit_change();
"""
SQLITE_INSTALL = [
    f"""CREATE TRIGGER IF NOT EXISTS benchbook_append_only_{op.lower()} BEFORE {op} ON {TABLE}
    BEGIN SELECT RAISE(ABORT, 'the audit trail is append-only'); END"""
    for op in ("UPDATE", "DELETE")
]
SQLITE_REMOVE = [
    f"DROP TRIGGER IF EXISTS benchbook_append_only_{op}" for op in ("update", "delete")
]


def install(connection):
    execute(connection, {"postgresql": [POSTGRES_INSTALL], "sqlite": SQLITE_INSTALL})


def remove(connection):
    execute(connection, {"postgresql": [POSTGRES_REMOVE], "sqlite": SQLITE_REMOVE})
