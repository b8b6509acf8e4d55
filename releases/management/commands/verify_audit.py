from django.core.management.base import BaseCommand, CommandError

from releases.audit import verify_audit


class Command(BaseCommand):
    help = "Recompute the audit trail's hash chain; report the first broken link."

    def handle(self, *args, **options):
        broken, head, count = verify_audit()
        if broken is not None:
            raise CommandError(
                f"audit chain broken at event #{broken} (of {count} read); last good hash {head}"
            )
        self.stdout.write(f"audit chain intact: {count} events, head {head}")
