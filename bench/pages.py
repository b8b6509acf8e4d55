"""Benchmark: server time of each dashboard page and API read, 1,000 versions x 5 splits.

    python bench/pages.py [--versions 1000] [--splits 5] [--repeat 30] [--scored 10]
                          [--old-repeat 5] [--var DIR]

Seeds a throw-away database (its own BENCHBOOK_VAR): splits loaded and frozen and the
newest ``--scored`` versions' predictions uploaded and scored through the real
services in this process; every older version is created by the service too, and
each of its sets carries a copy of one of those real scorecards (prediction file row,
set, evaluation, scorecard and class rows bulk-inserted: the pages read rows, and
scoring 5,000 files one by one would take most of the run). Then requests each page
repeatedly with Django's test client and prints median and p95 server time. The two
history reads are timed beside the design before one-series-per-request (a copy in
bench/legacy/, served on extra routes of this process only), with the ratio, and again
"cold": the per-process series forgotten before each request (the first read after a
change, ``releases.history_stamps``). Fails
(exit 1) if a p95 of the current design exceeds 150 ms. The target lives here, never
in a unit test. ``--var DIR`` seeds into DIR and, when DIR already holds a seeded
database, reads that one instead of seeding again (for profiling between runs).
"""

import argparse
import json
import os
import pathlib
import secrets
import statistics
import sys
import tempfile
import time

ROOT = pathlib.Path(__file__).resolve().parent.parent
TARGET_MS = 150


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--versions", type=int, default=1000)
    parser.add_argument("--splits", type=int, default=5)
    parser.add_argument("--repeat", type=int, default=30)
    parser.add_argument("--scored", type=int, default=10, help="versions scored for real")
    parser.add_argument(
        "--old-repeat", type=int, default=5, help="requests of the old design (seconds each)"
    )
    parser.add_argument("--var", help="seed into (or reuse the database seeded in) this dir")
    args = parser.parse_args()

    work = args.var or tempfile.mkdtemp(prefix="benchbook-pages-")
    seeded = pathlib.Path(work, "seeded")
    os.environ.update(BENCHBOOK_VAR=work, DJANGO_SETTINGS_MODULE="benchbook.settings")
    os.environ.setdefault("SECRET_KEY", secrets.token_urlsafe(32))  # a throw-away server
    os.environ.pop("DATABASE_URL", None)
    os.environ.pop("CELERY_BROKER_URL", None)
    sys.path.insert(0, str(ROOT))
    import django

    django.setup()
    from django.core.management import call_command
    from django.test.utils import setup_test_environment

    setup_test_environment()  # allows 'testserver' as a host, nothing else
    call_command("migrate", verbosity=0)
    if seeded.exists():
        from releases.models import Detector

        detector = Detector.objects.get(name="Forward camera")
        lead = detector.team.memberships.get().user
        split_id = min(detector.versions.first().prediction_sets.values_list("split", flat=True))
        print(f"reusing {seeded.read_text()}\n")
    else:
        detector, lead, split_id = _seed(args)
        seeded.write_text(f"{args.versions} versions x {args.splits} splits in {work}")
    _measure(args, detector, lead, split_id)


def _seed(args):
    """The detector, its lead and the first split, seeded as the module docstring says."""
    from django.contrib.auth import get_user_model
    from django.core.files.base import ContentFile

    from evaluation import services as evaluation_services
    from evaluation.services import queueing
    from releases import demo, services

    queueing.dispatch = lambda pk: None  # score below, in this process
    lead = get_user_model().objects.create_user("lead", password="x")
    team = services.create_team("Shuttle Perception", [(lead, "lead")])
    detector = services.create_detector(team, "Forward camera", demo.CLASSES, protocols=("coco",))
    truths = []
    for s in range(args.splits):
        truth = demo.split_truth(f"split-{s}", 1, 100 + s, 40, (1280, 720), s / args.splits, ())
        split = evaluation_services.load_split(
            name=f"split-{s}",
            revision=1,
            truth=ContentFile(json.dumps(truth).encode(), name=f"split-{s}.json"),
        )
        truths.append((split, truth))
    started = time.perf_counter()
    from evaluation.models import Evaluation

    dates = demo.release_dates(args.versions)
    copies = max(0, args.versions - args.scored)
    real = []
    for i, when in enumerate(dates):
        version = services.create_version(detector, f"0.{i}", lead, created_at=when)
        if i < copies:
            continue
        real.append(version)
        day, night, jitter = demo.version_quality("forward", min(i - copies, 12), f"0.{i}")
        for split, truth in truths:
            dets = demo.predictions(truth, day, night, jitter, seed=i * 31 + split.pk)
            services.submit_predictions(
                version,
                split,
                ContentFile(json.dumps(dets).encode(), name=f"{i}-{split.pk}.json"),
                lead,
            )
    for pk in Evaluation.objects.values_list("pk", flat=True):
        evaluation_services.run_evaluation(pk)
    scored = time.perf_counter() - started
    _copy_scorecards(detector, real, lead)
    print(
        f"seeded {args.versions} versions x {args.splits} splits "
        f"({Evaluation.objects.filter(state='done').count()} scorecards: "
        f"{len(real) * args.splits} scored in {scored:.0f} s, the rest copied) "
        f"in {time.perf_counter() - started:.0f} s\n"
    )
    return detector, lead, truths[0][0].pk


def _measure(args, detector, lead, split_id):
    from django.conf import settings
    from django.test import Client

    settings.ROOT_URLCONF = "bench.legacy.history"  # the old design's routes, this process only
    client = Client()
    client.force_login(lead)
    newest = detector.versions.order_by("-created_at").first()
    history = f"/detectors/{detector.pk}/"
    api_history = f"/api/v1/detectors/{detector.pk}/history/"
    pages = {
        "overview": "/",
        "history": history,
        "version scorecard": f"/versions/{newest.pk}/",
        "compare": f"/detectors/{detector.pk}/compare/",
        "split": f"/splits/{split_id}/",
        "splits": "/splits/",
        # The API answers the same reads for pipelines (session auth here).
        "api history": api_history,
        "api history AP50 car": f"{api_history}?metric=AP50&class=car&revisions=separate",
        "api versions page": "/api/v1/versions/?page_size=50",
        "api verdict": f"/api/v1/versions/{newest.pk}/verdict/",
        "api results": f"/api/v1/versions/{newest.pk}/results/",
        "api evaluations": f"/api/v1/evaluations/?version={newest.pk}",
        "api comparison": f"/api/v1/comparisons/?reference={newest.pk - 1}&candidate={newest.pk}",
    }
    before = {  # the design before, measured in the same run, not held to the target
        "history": f"/legacy{history}",
        "api history": f"/legacy/api/detectors/{detector.pk}/history/",
    }
    # The history series are kept per process until the detector changes
    # (releases.history_stamps): these rows forget them before every request, i.e. the
    # first read after an upload or a finished evaluation.
    from releases import history_stamps

    cold = {
        "history, cold": (history, history_stamps.clear),
        "api history, cold": (api_history, history_stamps.clear),
    }
    failures = []
    print(f"load average at the start: {_load()}")
    print(
        f"{'page':<22} {'median ms':>10} {'p95 ms':>8} {'cpu ms':>7} {'target':>8}"
        "   old design: median, p95"
    )
    rows = [(name, url, None) for name, url in pages.items()]
    rows += [(name, url, forget) for name, (url, forget) in cold.items()]
    for name, url, forget in rows:
        median, p95, cpu, size = _time(client, url, args.repeat, forget)
        ok = p95 <= TARGET_MS
        failures += [] if ok else [name]
        line = f"{name:<22} {median:>10.1f} {p95:>8.1f} {cpu:>7.1f} {'ok' if ok else 'MISSED':>8}"
        if name in before:
            old_median, old_p95, _, old_size = _time(client, before[name], args.old_repeat)
            line += (
                f"   {old_median:.1f}, {old_p95:.1f} ms: {old_p95 / p95:.1f}x the p95; "
                f"{size / 1e3:.0f} kB against {old_size / 1e3:.0f} kB"
            )
        print(line)
    import resource

    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"\nload average at the end: {_load()}; peak RSS of this process {peak:.0f} MB")
    print("cpu ms: median CPU time of this process per request (time.process_time)")
    print("\n" + ("targets met" if not failures else f"FAILED: {', '.join(failures)}"))
    return 1 if failures else 0


def _load():
    return ", ".join(f"{x:.2f}" for x in os.getloadavg())


def _time(client, url, repeat, before_each=None):
    """Median and p95 server time (ms) of ``repeat`` requests, median CPU ms, and the
    body size. ``before_each`` runs untimed before every request."""
    response = client.get(url)
    assert response.status_code == 200, url
    times, cpu = [], []
    for _ in range(repeat):
        if before_each:
            before_each()
        c, t = time.process_time(), time.perf_counter()
        client.get(url)
        times.append((time.perf_counter() - t) * 1000)
        cpu.append((time.process_time() - c) * 1000)
    times.sort()
    p95 = times[min(len(times) - 1, int(round(0.95 * (len(times) - 1))))]
    return statistics.median(times), p95, statistics.median(cpu), len(response.content)


def _copy_scorecards(detector, real, user):
    """Each older version's set on each split carries a copy of a real scorecard of
    that split (cycling through the scored versions): its own prediction file row,
    set, evaluation, scorecard and class rows, inserted in bulk."""
    import hashlib

    from django.db import transaction
    from django.utils import timezone

    from evaluation.models import ClassScore, Evaluation, PredictionFile, Scorecard
    from releases.models import PredictionSet

    older = list(detector.versions.exclude(pk__in=[v.pk for v in real]).order_by("created_at"))
    sets = list(PredictionSet.objects.filter(version__in=real).prefetch_related("evaluations"))
    templates = {}  # split id -> [(set, [(evaluation, scorecard, class rows)])]
    for found in sets:
        cards = []
        for evaluation in found.evaluations.filter(state="done"):
            card = evaluation.scorecard
            cards.append((evaluation, card, list(card.classes.all())))
        templates.setdefault(found.split_id, []).append((found, cards))
    now = timezone.now()
    with transaction.atomic():
        for split_id, choices in templates.items():
            plan = [(version, choices[i % len(choices)]) for i, version in enumerate(older)]
            files = PredictionFile.objects.bulk_create(
                PredictionFile(
                    file=template.predictions.file.name,
                    sha256=hashlib.sha256(f"copy {version.pk} {split_id}".encode()).hexdigest(),
                    size=template.predictions.size,
                    original_name=template.file_name,
                    record_count=template.predictions.record_count,
                )
                for version, (template, _) in plan
            )
            new_sets = PredictionSet.objects.bulk_create(
                PredictionSet(
                    version=version,
                    split_id=split_id,
                    predictions=file,
                    uploaded_by=user,
                    file_name=template.file_name,
                )
                for (version, (template, _)), file in zip(plan, files)
            )
            links, cards, rows = [], [], []
            for (_, (_, scored)), file, new_set in zip(plan, files, new_sets):
                for evaluation, card, classes in scored:
                    copy = Evaluation(
                        split_id=split_id,
                        predictions=file,
                        protocol=evaluation.protocol,
                        box_policy=evaluation.box_policy,
                        scope=evaluation.scope,
                        file_name=evaluation.file_name,
                        state="done",
                        progress=100,
                        attempts=1,
                        engine_version=evaluation.engine_version,
                        started_at=now,
                        finished_at=now,
                    )
                    cards.append((copy, card, classes, new_set))
            Evaluation.objects.bulk_create(c[0] for c in cards)
            Link = PredictionSet.evaluations.through
            links = [Link(predictionset=s, evaluation=e) for e, _, _, s in cards]
            Link.objects.bulk_create(links)
            new_cards = Scorecard.objects.bulk_create(
                Scorecard(
                    evaluation=e,
                    protocol=card.protocol,
                    protocol_version=card.protocol_version,
                    engine_version=card.engine_version,
                    split_sha256=card.split_sha256,
                    predictions_sha256=e.predictions.sha256,
                    summary=card.summary,
                    result=card.result,
                    records=card.records.name,
                    records_sha256=card.records_sha256,
                )
                for e, card, _, _ in cards
            )
            for new_card, (_, _, classes, _) in zip(new_cards, cards):
                for row in classes:
                    row.pk, row.scorecard = None, new_card
                    rows.append(copy_row(row))
            ClassScore.objects.bulk_create(rows, batch_size=2000)


def copy_row(row):
    from evaluation.models import ClassScore

    fields = {f.attname: getattr(row, f.attname) for f in ClassScore._meta.concrete_fields}
    fields.pop("id")
    return ClassScore(**fields)


if __name__ == "__main__":
    sys.exit(main())
