"""Database triggers that refuse UPDATE and DELETE of a frozen benchmark split.

Installed by migration 0002 on PostgreSQL and SQLite; kept here so that tests can
restore them after a flush.
"""

TABLE = "evaluation_benchmarksplit"

POSTGRES_INSTALL = f"""
CREATE OR REPLACE FUNCTION benchbook_refuse_frozen_split() RETURNS trigger AS $$
BEGIN
    IF OLD.frozen_at IS NOT NULL THEN
        RAISE EXCEPTION 'benchmark split % rev % is frozen', OLD.name, OLD.revision
            USING ERRCODE = 'restrict_violation';
    END IF;
    IF TG_OP = 'DELETE' THEN RETURN OLD; END IF;
    RETURN NEW;
END;
$$ LANGUAGE plpgsql;
DROP TRIGGER IF EXISTS benchbook_frozen_split ON {TABLE};
CREATE TRIGGER benchbook_frozen_split BEFORE UPDATE OR DELETE ON {TABLE}
    FOR EACH ROW EXECUTE FUNCTION benchbook_refuse_frozen_split();
"""
POSTGRES_REMOVE = f"""
DROP TRIGGER IF EXISTS benchbook_frozen_split ON {TABLE};
DROP FUNCTION IF EXISTS benchbook_refuse_frozen_split();
"""
SQLITE_INSTALL = [
    f"""CREATE TRIGGER IF NOT EXISTS benchbook_frozen_split_{op.lower()} BEFORE {op} ON {TABLE}
    WHEN OLD.frozen_at IS NOT NULL
    BEGIN SELECT RAISE(ABORT, 'benchmark split is frozen'); END"""
    for op in ("UPDATE", "DELETE")
]
SQLITE_REMOVE = [
    f"DROP TRIGGER IF EXISTS benchbook_frozen_split_{op}" for op in ("update", "delete")
]


def _statements(vendor, install):
    if vendor == "postgresql":
        return [POSTGRES_INSTALL if install else POSTGRES_REMOVE]
    if vendor == "sqlite":
        return SQLITE_INSTALL if install else SQLITE_REMOVE
    raise RuntimeError(f"no frozen-split trigger for database {vendor!r}")


def install(connection):
    with connection.cursor() as cursor:
        for statement in _statements(connection.vendor, True):
            cursor.execute(statement)


def remove(connection):
    with connection.cursor() as cursor:
        for statement in _statements(connection.vendor, False):
            cursor.execute(statement)
