from django.core.management.base import BaseCommand, CommandError

from releases.audit_check import check, read_head_file, verify_and_record


class Command(BaseCommand):
    help = (
        "Recompute the audit trail's hash chain, re-derive the digests of stored results, "
        "judgements and decisions from their rows, and (with --head) check the chain "
        "against a head file written outside the database. The outcome is kept as the "
        "last verification the audit page shows (--no-record: not kept). Exits 1 on "
        "any finding."
    )

    def add_arguments(self, parser):
        parser.add_argument(
            "--head",
            metavar="FILE",
            help="the head file (a copy of BENCHBOOK_AUDIT_HEAD_FILE): 'id hash' lines; "
            "by default the configured BENCHBOOK_AUDIT_HEAD_FILE, if any",
        )
        parser.add_argument(
            "--no-record", action="store_true", help="do not keep the outcome for the audit page"
        )

    def handle(self, *args, head=None, no_record=False, **options):
        lines = None
        if head:
            try:
                lines = read_head_file(head)
            except OSError as e:
                raise CommandError(f"cannot read the head file {head}: {e.strerror}") from None
        if no_record:
            report = check(lines)  # the configured head file only through --head
        else:
            report, _ = verify_and_record("verify_audit command", head_file=head)
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
        checked = (
            f", {report.results_checked} results, {report.judgements_checked} judgements and "
            f"{report.decisions_checked} decisions re-derived"
        )
        against = f", matches {head}" if head else ""
        self.stdout.write(
            f"audit chain intact: {report.count} events, head {report.head}{checked}{against}"
        )
