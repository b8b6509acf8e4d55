"""Record a lead's decision on a version from the shell: the same ``services.sign_off``
as the page and the API, with the same refusals (only a final verdict; approving
anything but ``pass`` is an override that needs a written justification)."""

from django.contrib.auth import get_user_model
from django.core.exceptions import PermissionDenied
from django.core.management.base import BaseCommand, CommandError

from releases import services
from releases.models import ModelVersion

DECISIONS = {"approve": "approved", "approved": "approved", "reject": "rejected"}
DECISIONS["rejected"] = "rejected"


class Command(BaseCommand):
    help = (
        "Sign off a version: VERSION_ID --decision approve|reject --user LEAD "
        "--comment TEXT [--justification TEXT] (an override needs the justification)"
    )

    def add_arguments(self, parser):
        # Positional: Django's commands already have --version (their own).
        parser.add_argument("version", type=int, help="the model version's id")
        parser.add_argument("--decision", required=True, choices=sorted(DECISIONS))
        parser.add_argument("--user", required=True, help="username of a lead of the team")
        parser.add_argument("--comment", required=True)
        parser.add_argument(
            "--justification",
            default="",
            help="required to approve a version whose verdict is not pass (an override)",
        )

    def handle(self, *args, **options):
        user = get_user_model().objects.filter(username=options["user"]).first()
        if user is None:
            raise CommandError(f"--user: no user {options['user']!r}")
        version = (
            ModelVersion.objects.select_related("detector__team")
            .filter(pk=options["version"])
            .first()
        )
        if version is None:
            raise CommandError(f"version: no version {options['version']}")
        try:
            record, event = services.sign_off(
                version,
                user,
                DECISIONS[options["decision"]],
                options["comment"],
                justification=options["justification"],
            )
        except (services.DecisionError, PermissionDenied) as e:
            raise CommandError(str(e)) from None
        kind = "override" if record.override else record.decision
        self.stdout.write(
            f"{version}: {kind} by {user} on verdict {record.verdict} "
            f"(sign-off {record.pk}, audit event {event.pk})"
        )
