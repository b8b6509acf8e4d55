"""Benchmark: server time of each dashboard page and API read, 200 versions x 5 splits.

    python bench/pages.py [--versions 200] [--splits 5] [--repeat 30]

Seeds a throw-away database (its own BENCHBOOK_VAR) through the real services —
splits loaded and frozen, predictions uploaded, every evaluation scored by the
scoring service in this process — then requests each page repeatedly with Django's
test client and prints median and p95 server time. Fails (exit 1) if a p95 exceeds
150 ms. The target lives here, never in a unit test.
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
    parser.add_argument("--versions", type=int, default=200)
    parser.add_argument("--splits", type=int, default=5)
    parser.add_argument("--repeat", type=int, default=30)
    args = parser.parse_args()

    work = tempfile.mkdtemp(prefix="benchbook-pages-")
    os.environ.update(BENCHBOOK_VAR=work, DJANGO_SETTINGS_MODULE="benchbook.settings")
    os.environ.setdefault("SECRET_KEY", secrets.token_urlsafe(32))  # a throw-away server
    os.environ.pop("DATABASE_URL", None)
    os.environ.pop("CELERY_BROKER_URL", None)
    sys.path.insert(0, str(ROOT))
    import django

    django.setup()
    from django.core.files.base import ContentFile
    from django.core.management import call_command
    from django.test import Client
    from django.test.utils import setup_test_environment

    from evaluation import services as evaluation_services
    from releases import demo, services

    setup_test_environment()  # allows 'testserver' as a host, nothing else
    call_command("migrate", verbosity=0)
    evaluation_services.dispatch = lambda pk: None  # score below, in this process
    from django.contrib.auth import get_user_model

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

    for i, when in enumerate(demo.release_dates(args.versions)):
        version = services.create_version(detector, f"0.{i}", lead, created_at=when)
        day, night, jitter = demo.version_quality("forward", min(i, 12), f"0.{i}")
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
    print(
        f"seeded {args.versions} versions x {args.splits} splits "
        f"({Evaluation.objects.filter(state='done').count()} scorecards) "
        f"in {time.perf_counter() - started:.0f} s\n"
    )

    client = Client()
    client.force_login(lead)
    newest = detector.versions.order_by("-created_at").first()
    pages = {
        "overview": "/",
        "history": f"/detectors/{detector.pk}/",
        "version scorecard": f"/versions/{newest.pk}/",
        "compare": f"/detectors/{detector.pk}/compare/",
        "split": f"/splits/{truths[0][0].pk}/",
        "splits": "/splits/",
        # The API answers the same reads for pipelines (session auth here).
        "api history": f"/api/v1/detectors/{detector.pk}/history/",
        "api versions page": "/api/v1/versions/?page_size=50",
        "api verdict": f"/api/v1/versions/{newest.pk}/verdict/",
        "api results": f"/api/v1/versions/{newest.pk}/results/",
        "api evaluations": f"/api/v1/evaluations/?version={newest.pk}",
        "api comparison": f"/api/v1/comparisons/?reference={newest.pk - 1}&candidate={newest.pk}",
    }
    failures = []
    print(f"{'page':<20} {'median ms':>10} {'p95 ms':>8} {'target':>8}")
    for name, url in pages.items():
        assert client.get(url).status_code == 200, url
        times = []
        for _ in range(args.repeat):
            t = time.perf_counter()
            client.get(url)
            times.append((time.perf_counter() - t) * 1000)
        times.sort()
        p95 = times[min(len(times) - 1, int(round(0.95 * (len(times) - 1))))]
        ok = p95 <= TARGET_MS
        failures += [] if ok else [name]
        verdict = "ok" if ok else "MISSED"
        print(f"{name:<20} {statistics.median(times):>10.1f} {p95:>8.1f} {verdict:>8}")
    print("\n" + ("targets met" if not failures else f"FAILED: {', '.join(failures)}"))
    return 1 if failures else 0


if __name__ == "__main__":
    sys.exit(main())
