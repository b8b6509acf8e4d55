"""The pipeline client gates on road rules end to end — a live server, a real worker,
the client as a separate process without Django: a suite naming coco, kitti2d and the
pedestrian miss-rate setups, and rules naming a difficulty level (moderate AP), a
pedestrian setup (reasonable miss rate, lower is better) and a size bucket (COCO's
small). Exit codes: 0 for pass, 3 for a regression and for an incomplete verdict (the
level's protocol dropped from the suite: a missing outcome is never a pass)."""

import numpy as np
import pytest

from evaluation import services as evaluation_services
from releases import tokens

from ..engine.test_difficulty import _random_scene, _write
from .conftest import upload
from .test_client import client_home, run  # noqa: F401  (fixtures: the client process)
from .test_level_protocols import KITTI_CLASSES, _zip
from .test_worker import worker  # noqa: F401

pytestmark = [pytest.mark.integration, pytest.mark.django_db(transaction=True)]

RULES = [
    {
        "metric": "AP",
        "level": "moderate",
        "class": "mean",
        "split": "*",
        "kind": "min_value",
        "threshold": 0.0,
    },
    {
        "metric": "miss_rate",
        "level": "reasonable",
        "class": "Pedestrian",
        "split": "*",
        "kind": "min_value",
        "threshold": 0.99,
    },
    {  # no significant rise of the reasonable miss rate over the baseline (1.0)
        "metric": "miss_rate",
        "level": "reasonable",
        "class": "Pedestrian",
        "split": "*",
        "kind": "no_significant_drop",
    },
    {
        "metric": "AP",
        "size": "small",
        "class": "mean",
        "split": "*",
        "kind": "min_value",
        "threshold": 0.0,
    },
]


@pytest.mark.usefixtures("worker")
def test_the_client_exits_on_level_setup_and_size_rules(live_server, team, users, run, tmp_path):  # noqa: F811
    scenes, detections = _random_scene(np.random.default_rng(7), 60)
    _write(tmp_path / "gt", scenes, detections)
    evaluation_services.load_split(
        name="kerb-road", revision=1, truth=upload("labels.zip", _zip(tmp_path / "gt"))
    )
    (tmp_path / "good.zip").write_bytes(_zip(tmp_path / "gt_det"))
    no_pedestrians = [[d for d in dets if d[0] != "Pedestrian"] for dets in detections]
    _write(tmp_path / "worse", scenes, no_pedestrians)
    (tmp_path / "worse.zip").write_bytes(_zip(tmp_path / "worse_det"))

    from rest_framework.test import APIClient

    lead = APIClient()
    lead.credentials(HTTP_AUTHORIZATION=f"Bearer {tokens.create_token(users['lead'], 'l')[1]}")
    created = lead.post(
        "/api/v1/detectors/",
        {
            "team": team.pk,
            "name": "Kerb road",
            "classes": KITTI_CLASSES,
            "suite": {"splits": ["kerb-road"], "protocols": ["coco", "kitti2d", "miss-rate"]},
        },
        format="json",
    )
    assert created.status_code == 201, created.json()
    detector = created.json()["id"]
    saved = lead.post(f"/api/v1/detectors/{detector}/criteria/", {"rules": RULES}, format="json")
    assert saved.status_code == 201, saved.json()

    connect = ["--url", live_server.url, "--token", tokens.create_token(users["engineer"], "e")[1]]

    def submit(version, predictions):
        return run(
            "submit",
            *connect,
            "--detector",
            "Kerb road",
            "--version",
            version,
            "--split",
            "kerb-road",
            "--predictions",
            predictions,
            "--wait",
            "--poll",
            "0.3",
        )

    code, out, err = submit("1.0", tmp_path / "good.zip")
    assert code == 0, out + err
    assert "1.0: pass" in out
    assert "at moderate (kitti2d)" in out and "at reasonable (miss-rate)" in out
    assert "small" in out  # the size rule's outcome

    assert "no baseline scored on this split" in out  # the significance rule, before 1.0

    # 1.0 becomes the baseline. Every pedestrian missed in 1.1: the reasonable setup's
    # miss rate is 1, above its maximum, and its rise over 1.0 is significant (the
    # paired image bootstrap over the setup's stored samples).
    from releases.models import ModelVersion

    first = ModelVersion.objects.get(label="1.0")
    approved = lead.post(
        f"/api/v1/versions/{first.pk}/sign-off/",
        {"decision": "approved", "comment": "baseline"},
        format="json",
    )
    assert approved.status_code == 201, approved.json()
    code, out, err = submit("1.1", tmp_path / "worse.zip")
    assert code == 3, out + err
    assert "1.1: regression" in out
    failed = [line for line in out.splitlines() if " fail " in f" {line} "]
    assert any("miss_rate of Pedestrian at reasonable" in line for line in failed), out
    assert any("% interval" in line and "(lower is better)" in line for line in failed), out

    # compare gives the deltas by size bucket and by level and setup
    code, out, err = run("compare", *connect, "--detector", "Kerb road", "1.0", "1.1")
    assert code == 0, out + err
    assert "kerb-road rev 1 by size (coco AP, mean)" in out and "small" in out
    assert "by level (kitti2d AP_R40, higher is better)" in out and "moderate" in out
    assert "by level (miss-rate miss_rate, lower is better)" in out and "reasonable" in out

    # The suite drops kitti2d: the moderate rule has no result, the verdict is incomplete.
    dropped = lead.post(
        f"/api/v1/detectors/{detector}/suite/",
        {"splits": ["kerb-road"], "protocols": ["coco", "miss-rate"]},
        format="json",
    )
    assert dropped.status_code == 201, dropped.json()
    # the suite change re-judges in the worker: wait for that verdict (1.1: 1.0 is the
    # approved baseline now, its verdict final)
    wait = ["--wait", "--wait-timeout", "60", "--poll", "0.3"]
    code, out, err = run("status", *connect, "--detector", "Kerb road", "1.1", *wait)
    assert code == 3, out + err
    assert "incomplete" in out
