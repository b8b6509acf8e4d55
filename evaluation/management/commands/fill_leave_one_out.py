"""Store the per-image leave-one-out file of scorecards that have none in the current
engine version (``evaluation.loo_fill``): run once after an upgrade so that the
per-image list of older evaluations reads the file instead of computing on request."""

import time

from django.core.management.base import BaseCommand, CommandError

from evaluation import loo_fill
from evaluation.storage import ContentMismatch


class Command(BaseCommand):
    help = (
        "Store the per-image leave-one-out file of every finished evaluation that has none "
        "in this engine version (or only --evaluation ID ...); --queue sends one worker task "
        "per scorecard instead; --dry-run lists them. Idempotent."
    )

    def add_arguments(self, parser):
        parser.add_argument(
            "--evaluation", type=int, action="append", help="an evaluation's id (repeatable)"
        )
        parser.add_argument(
            "--queue", action="store_true", help="one worker task per scorecard, not here"
        )
        parser.add_argument("--dry-run", action="store_true", help="list them, store nothing")

    def handle(self, *args, evaluation=None, queue=False, dry_run=False, **options):
        cards = list(loo_fill.wanting(evaluation))
        if evaluation:
            missing = sorted(set(evaluation) - {c.evaluation_id for c in cards})
            for pk in missing:
                self.stdout.write(
                    f"evaluation {pk}: nothing to fill (stored already, not a "
                    "finished match-records evaluation, or no such evaluation)"
                )
        failed = 0
        for card in cards:
            name = f"evaluation {card.evaluation_id} ({card.protocol} on {card.evaluation.split})"
            if dry_run:
                self.stdout.write(f"{name}: no leave-one-out file")
                continue
            if queue:
                from evaluation.tasks import fill_leave_one_out

                fill_leave_one_out.delay(card.pk)
                self.stdout.write(f"{name}: queued")
                continue
            wall = time.perf_counter()
            try:
                done = loo_fill.fill(card.pk)
            except ContentMismatch as e:  # signalled for the audit trail by the check
                failed += 1
                self.stderr.write(f"{name}: not filled, {e}")
                continue
            except OSError as e:  # the records (or split) file is gone from the storage
                failed += 1
                self.stderr.write(
                    f"{name}: not filled, its records file {card.records.name} could not be "
                    f"read ({e.strerror or e})"
                )
                continue
            if done.status == "stored":
                self.stdout.write(
                    f"{name}: stored {len(done.row.members)} members "
                    f"({done.row.file.size / 1e6:.1f} MB) in {done.cpu_seconds:.1f} s CPU, "
                    f"{time.perf_counter() - wall:.1f} s wall"
                )
            else:
                self.stdout.write(f"{name}: {done.status} {done.reason}".rstrip())
        verb = "to fill" if dry_run else "queued" if queue else "processed"
        self.stdout.write(f"{len(cards)} {verb}, {failed} failed")
        if failed:
            raise CommandError(
                f"{failed} scorecard(s) not filled: their records file changed or is missing"
            )
