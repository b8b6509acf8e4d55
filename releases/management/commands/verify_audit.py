from django.core.management.base import BaseCommand, CommandError

from releases.audit_check import check


class Command(BaseCommand):
    help = (
        "Recompute the audit trail's hash chain, re-derive the digests of stored results "
        "and decisions from their rows, and (with --head) check the chain against a head "
        "file written outside the database. Exits 1 on any finding."
    )

    def add_arguments(self, parser):
        parser.add_argument(
            "--head",
            metavar="FILE",
            help="the head file (BENCHBOOK_AUDIT_HEAD_FILE, or a copy of it): 'id hash' lines",
        )

    def handle(self, *args, head=None, **options):
        lines = None
        if head:
            try:
                with open(head, encoding="utf-8") as f:
                    lines = f.readlines()
            except OSError as e:
                raise CommandError(f"cannot read the head file {head}: {e.strerror}") from None
        report = check(lines)
        for note in report.notes:
            self.stdout.write(f"note: {note}")
        if not report.ok:
            first = (
                f"audit chain broken at event #{report.broken} (of {report.count} read); "
                f"last good hash {report.head}"
                if report.broken is not None
                else f"audit check failed: {len(report.problems)} finding(s), {report.count} events"
            )
            raise CommandError("\n".join([first, *(f"  {p}" for p in report.problems)]))
        checked = f", {report.results_checked} results re-derived"
        against = f", matches {head}" if head else ""
        self.stdout.write(
            f"audit chain intact: {report.count} events, head {report.head}{checked}{against}"
        )
