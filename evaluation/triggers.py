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


def execute(connection, statements):
    """Run the statements for this database, ``{vendor: [sql, ...]}``."""
    try:
        chosen = statements[connection.vendor]
    except KeyError:
        raise RuntimeError(f"no trigger for database {connection.vendor!r}") from None
    with connection.cursor() as cursor:
        for statement in chosen:
            cursor.execute(statement)


def install(connection):
    execute(connection, {"postgresql": [POSTGRES_INSTALL], "sqlite": SQLITE_INSTALL})


def remove(connection):
    execute(connection, {"postgresql": [POSTGRES_REMOVE], "sqlite": SQLITE_REMOVE})
