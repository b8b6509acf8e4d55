"""The cause pages on a demo-like story: from 1.5's failing night-pedestrian rule to the
images behind it and one image's boxes; every object behind a team check."""

import json

import numpy as np
import pytest
from django.test import override_settings
from django.urls import reverse

from releases.models import Outcome
from releases.selectors import cause

from . import cause_scenario

pytestmark = pytest.mark.django_db


@pytest.fixture
def story(users, team, run_tasks):
    with override_settings(BENCHBOOK_BOOTSTRAP_RESAMPLES=200):
        return cause_scenario.build(users, team, run_tasks)


def test_the_demo_like_rule_fails(story):
    failing = Outcome.objects.filter(version=story["1.5"], status="fail")
    assert [(o.class_name, o.rule.get("tag")) for o in failing] == [("pedestrian", "night")]


def test_drilldown_draws_what_the_records_say(client, users, story):
    """Each detection's outcome on the page is the stored records' (TP where the
    protocol matched it); each box's 'found' score is that of its TP."""
    client.force_login(users["engineer"])
    pair = cause.pair_for(users["engineer"], story["1.5"].pk, story["split"].pk)
    assert pair.reference.version == story["1.4"]  # the judged baseline by default
    records = pair.candidate.records
    image = int(records.det_image[0])
    response = client.get(reverse("image-detail", args=[story["1.5"].pk, story["split"].pk, image]))
    assert response.status_code == 200
    html = response.content.decode()
    start = html.index('id="drilldown-data"')
    data = json.loads(html[html.index(">", start) + 1 : html.index("</script>", start)])
    is_tp, _ = records.outcomes(0, 0)
    mine = np.flatnonzero(records.det_image == image)
    assert sorted(
        d["score"] for d in data["candidate"]["detections"] if d["outcome"] == "tp"
    ) == sorted(round(float(records.det_score[d]), 4) for d in mine if is_tp[d])
    truth = pair.truth
    assert len(data["truth"]) == int((truth.box_image == image).sum())
    assert data["image"]["width"] == 1280 and data["image"]["url"] is None
    assert data["reference"]["label"] == "1.4"


def test_other_teams_get_404_on_every_cause_page(client, users, story, rival_detector):
    version, split = story["1.5"], story["split"]
    evaluation = cause.pair_for(users["lead"], version.pk, split.pk).candidate.evaluation
    urls = [
        reverse("image-list", args=[version.pk]) + f"?split={split.pk}",
        reverse("image-detail", args=[version.pk, split.pk, 0]),
        reverse("image-file", args=[version.pk, split.pk, 0]),
        reverse("records-download", args=[evaluation.pk, "csv"]),
        reverse("records-download", args=[evaluation.pk, "jsonl"]),
    ]
    for name in ("rival", "outsider"):
        client.force_login(users[name])
        for url in urls:
            assert client.get(url).status_code == 404, (name, url)
    client.logout()
    assert all(client.get(url).status_code == 302 for url in urls)  # to the login page
