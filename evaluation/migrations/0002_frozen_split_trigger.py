"""The database itself refuses UPDATE and DELETE of a frozen benchmark split."""

from django.db import migrations

TABLE = "evaluation_benchmarksplit"

POSTGRES_UP = f"""
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
CREATE TRIGGER benchbook_frozen_split BEFORE UPDATE OR DELETE ON {TABLE}
    FOR EACH ROW EXECUTE FUNCTION benchbook_refuse_frozen_split();
"""
POSTGRES_DOWN = f"""
DROP TRIGGER IF EXISTS benchbook_frozen_split ON {TABLE};
DROP FUNCTION IF EXISTS benchbook_refuse_frozen_split();
"""
SQLITE_UP = [
    f"""CREATE TRIGGER IF NOT EXISTS benchbook_frozen_split_{op.lower()} BEFORE {op} ON {TABLE}
    WHEN OLD.frozen_at IS NOT NULL
    BEGIN SELECT RAISE(ABORT, 'benchmark split is frozen'); END;"""
    for op in ("UPDATE", "DELETE")
]


def install(apps, schema_editor):
    vendor = schema_editor.connection.vendor
    if vendor == "postgresql":
        schema_editor.execute(POSTGRES_UP)
    elif vendor == "sqlite":
        for statement in SQLITE_UP:
            schema_editor.execute(statement)
    else:
        raise RuntimeError(f"no frozen-split trigger for database {vendor!r}")


def remove(apps, schema_editor):
    vendor = schema_editor.connection.vendor
    if vendor == "postgresql":
        schema_editor.execute(POSTGRES_DOWN)
    elif vendor == "sqlite":
        for op in ("update", "delete"):
            schema_editor.execute(f"DROP TRIGGER IF EXISTS benchbook_frozen_split_{op}")


class Migration(migrations.Migration):
    dependencies = [("evaluation", "0001_initial")]
    operations = [migrations.RunPython(install, remove)]
