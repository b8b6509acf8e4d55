"""Create, list and revoke personal API tokens (the user's page does the same)."""

from django.contrib.auth import get_user_model
from django.core.management.base import BaseCommand, CommandError

from evaluation.services import UploadError
from releases import tokens
from releases.models import ApiToken


class Command(BaseCommand):
    help = "Manage API tokens: create USER --name NAME | list [USER] | revoke TOKEN_ID"

    def add_arguments(self, parser):
        actions = parser.add_subparsers(dest="action", required=True)
        create = actions.add_parser("create", help="print a new token (shown only once)")
        create.add_argument("username")
        create.add_argument("--name", required=True, help="what the token is for")
        listing = actions.add_parser("list", help="tokens, without their secret")
        listing.add_argument("username", nargs="?")
        revoke = actions.add_parser("revoke", help="revoke a token by its id")
        revoke.add_argument("token_id", type=int)

    def handle(self, *args, **options):
        action = options["action"]
        if action == "create":
            user = self._user(options["username"])
            try:
                row, token = tokens.create_token(user, options["name"])
            except UploadError as e:
                raise CommandError(str(e)) from None
            self.stderr.write(f"token {row.pk} for {user}; it is not shown again:")
            self.stdout.write(token)
        elif action == "list":
            rows = ApiToken.objects.select_related("user")
            if options["username"]:
                rows = rows.filter(user=self._user(options["username"]))
            for row in rows:
                state = "active" if row.active else f"revoked {row.revoked_at:%Y-%m-%d %H:%M}"
                used = f"{row.last_used_at:%Y-%m-%d %H:%M}" if row.last_used_at else "never"
                self.stdout.write(
                    f"{row.pk}\t{row.user}\t{row.prefix}…\t{row.name}\t{state}\tlast used {used}"
                )
        else:
            row = ApiToken.objects.filter(pk=options["token_id"]).select_related("user").first()
            if row is None:
                raise CommandError(f"no token {options['token_id']}")
            tokens.revoke_token(row.user, row.pk)
            self.stdout.write(f"token {row.pk} of {row.user} revoked")

    def _user(self, username):
        try:
            return get_user_model().objects.get(username=username)
        except get_user_model().DoesNotExist:
            raise CommandError(f"no user {username!r}") from None
