"""The invented demo scenario, seeded through the real services and scoring path."""

import pytest
from django.core.management import call_command

from evaluation.models import ClassScore, Evaluation
from releases import selectors
from releases.models import Detector, Outcome

pytestmark = pytest.mark.django_db


def _ap50(detector, label, split, revision, class_name="pedestrian"):
    return ClassScore.objects.get(
        class_name=class_name,
        scorecard__evaluation__protocol="coco",
        scorecard__evaluation__split__name=split,
        scorecard__evaluation__split__revision=revision,
        scorecard__evaluation__predictions__original_name=f"{detector}-{label}-{split}-r{revision}.json",
    ).ap50


def test_demo_scenario(run_tasks, capsys, settings):
    settings.BENCHBOOK_BOOTSTRAP_RESAMPLES = 150
    run_tasks(call_command, "seed_demo", password="demo-pass")
    call_command("seed_demo", wait=5)  # already seeded: waits, then the lead's decisions
    out = capsys.readouterr().out
    assert "password: demo-pass" in out and "Forward camera 1.4: approved" in out
    assert Evaluation.objects.exclude(state="done").count() == 0
    assert Evaluation.objects.count() == 104  # 13 versions x 4 splits x 2 protocols
    forward = Detector.objects.get(slug="forward-camera")
    assert selectors.baseline_of(forward).label == "1.4"
    # The real regression: pedestrians at night, 1.5 against the 1.4 baseline.
    assert _ap50("forward", "1.5", "bay-night", 1) < _ap50("forward", "1.4", "bay-night", 1) - 0.15
    # By day the same version is no worse for pedestrians.
    assert _ap50("forward", "1.5", "bay-day", 1) > _ap50("forward", "1.4", "bay-day", 1) - 0.03

    # Judged against the 1.4 baseline: the night pedestrian drop of 1.5 is significant...
    version = forward.versions.get(label="1.5")
    night = Outcome.objects.get(
        version=version,
        rule_index=2,
        class_name="pedestrian",
        split__name="bay-night",
        split__revision=1,
    )
    assert night.status == "fail" and night.high < 0
    # ...while drops whose interval holds zero are shown as not significant, not failures.
    judged = Outcome.objects.filter(version=version, rule_index=2)
    assert judged.filter(status="not significant").exists()
    for o in judged:
        assert (o.status == "fail") == (o.high < 0), o.detail
        if o.status == "not significant":
            assert o.value < o.baseline_value and o.low < 0 <= o.high
