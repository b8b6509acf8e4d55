"""The privileges of the application's database role (PostgreSQL).

Migrations run as the role that owns the tables; the web processes and workers run as a
role that owns nothing, so they cannot drop or disable the append-only triggers. It may
read everything and insert everywhere; it may not UPDATE, DELETE or TRUNCATE the
append-only tables, nor DELETE evaluations, nor TRUNCATE anything.
"""

from evaluation import triggers as evaluation_triggers

from . import triggers as release_triggers

EVALUATIONS = evaluation_triggers.EVALUATION


def append_only_tables():
    return [*evaluation_triggers.protected_tables(), *release_triggers.protected_tables()]


def privileges_of(table):
    if table in append_only_tables():
        return "SELECT, INSERT"
    if table == EVALUATIONS:  # a finished one is also guarded column by column (trigger)
        return "SELECT, INSERT, UPDATE"
    if table == "django_migrations":
        return "SELECT"
    return "SELECT, INSERT, UPDATE, DELETE"


def grant_statements(connection, role):
    """SQL that gives ``role`` exactly the application's privileges on every table of
    the database as migrated now (run again after each ``migrate``)."""
    quote = connection.ops.quote_name
    name = quote(role)
    statements = [
        f"GRANT CONNECT ON DATABASE {quote(connection.settings_dict['NAME'])} TO {name}",
        f"GRANT USAGE ON SCHEMA public TO {name}",
        f"REVOKE ALL ON ALL TABLES IN SCHEMA public FROM {name}",
    ]
    for table in sorted(connection.introspection.table_names()):
        statements.append(f"GRANT {privileges_of(table)} ON {quote(table)} TO {name}")
    statements.append(f"GRANT USAGE, SELECT ON ALL SEQUENCES IN SCHEMA public TO {name}")
    return statements


def grant(connection, role):
    """Run ``grant_statements`` in one transaction; the number of tables covered."""
    from django.db import transaction

    statements = grant_statements(connection, role)
    with transaction.atomic(using=connection.alias), connection.cursor() as cursor:
        for statement in statements:
            cursor.execute(statement)
    return len(statements) - 4


def grant_after_migrate(sender, using, **kwargs):
    """``post_migrate``: with ``BENCHBOOK_DB_APP_ROLE`` set (PostgreSQL), every migrate
    ends by granting that role its privileges again, so a table a new migration created
    is never left out (or open) until someone remembers ``grant_app_role``."""
    from django.conf import settings
    from django.db import connections

    role = getattr(settings, "BENCHBOOK_DB_APP_ROLE", "")
    connection = connections[using]
    if role and connection.vendor == "postgresql":
        grant(connection, role)
