from django.core.management.base import BaseCommand, CommandError
from django.db import connection

from releases.db_roles import grant, grant_statements


class Command(BaseCommand):
    help = (
        "Give the application's PostgreSQL role (one that owns nothing) its privileges: "
        "read everything, insert everywhere, never change the append-only tables. Run as "
        "the owner; with BENCHBOOK_DB_APP_ROLE set, migrate does it at its end."
    )

    def add_arguments(self, parser):
        parser.add_argument("role", help="the role the web processes and workers log in as")
        parser.add_argument(
            "--print", action="store_true", help="only print the statements (for psql)"
        )

    def handle(self, *args, role, **options):
        if connection.vendor != "postgresql":
            raise CommandError(
                "roles are a PostgreSQL matter; this database is " + connection.vendor
            )
        if options["print"]:
            self.stdout.write(";\n".join(grant_statements(connection, role)) + ";")
            return
        self.stdout.write(f"{role}: privileges granted on {grant(connection, role)} tables")
