"""Database triggers that make the audit trail append-only (PostgreSQL and SQLite)."""

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


def _statements(vendor, install):
    if vendor == "postgresql":
        return [POSTGRES_INSTALL if install else POSTGRES_REMOVE]
    if vendor == "sqlite":
        return SQLITE_INSTALL if install else SQLITE_REMOVE
    raise RuntimeError(f"no append-only trigger for database {vendor!r}")


def install(connection):
    with connection.cursor() as cursor:
        for statement in _statements(connection.vendor, True):
            cursor.execute(statement)


def remove(connection):
    with connection.cursor() as cursor:
        for statement in _statements(connection.vendor, False):
            cursor.execute(statement)
