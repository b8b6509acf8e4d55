"""The pedestrian miss-rate presets as level protocols in the platform (setups as
levels, ``evaluation.levels._miss_rate``): scored by the worker, the stored
log-average miss rate of every setup equal to a transliteration of the pedestrian
detection toolbox's ``dbEval``/``bbGt evalRes`` (Dollár et al., TPAMI 2012;
tests/engine/pedestrian_oracle.py), and release rules on a setup judged with the
metric's direction: lower is better, so ``min_value`` means "at most"."""

import numpy as np
import pytest

from evaluation import services as evaluation_services
from evaluation.models import Evaluation, SliceScore
from releases import criteria, services, verdicts
from releases.models import Outcome

from ..engine import pedestrian_oracle
from ..engine.test_pedestrian import _box, _files, _oracle_scene
from .conftest import upload

pytestmark = pytest.mark.django_db
SETUPS = ("reasonable", "small", "heavy", "all")


def _scene(rng, n_images=16):
    scene = []
    for _ in range(n_images):
        gt, dt = [], []
        for _ in range(int(rng.integers(0, 5))):
            h = float(rng.choice([30.0, 45.0, 55.0, 70.0, 90.0, 140.0]))
            x, y = float(rng.integers(0, 500)), float(rng.integers(0, 300))
            vis = [None, 0.1, 0.3, 0.5, 0.7, 1.0][int(rng.integers(6))]
            cls = "people" if rng.random() < 0.1 else "pedestrian"
            gt.append(_box(x, y, 0.41 * h, h, vis, cls))
            if rng.random() < 0.75:
                dt.append(
                    (
                        [x + float(rng.integers(-4, 5)), y, 0.41 * h, h],
                        round(float(rng.random()), 3),
                    )
                )
        for _ in range(int(rng.integers(0, 3))):  # false alarms
            h = float(rng.choice([40.0, 60.0, 100.0]))
            dt.append(
                ([float(rng.integers(0, 500)), float(rng.integers(0, 300)), 0.41 * h, h], 0.4)
            )
        regions = [[10.0, 10.0, 60.0, 120.0]] if rng.random() < 0.2 else []
        scene.append({"gt": gt, "dt": dt, "regions": regions})
    return scene


@pytest.fixture
def walkers(tmp_path, team, users, django_capture_on_commit_callbacks, run_tasks):
    scene = _scene(np.random.default_rng(3))
    _files(tmp_path, scene)
    split = evaluation_services.load_split(
        name="kerb-walk", revision=1, truth=upload("gt.json", (tmp_path / "gt.json").read_bytes())
    )
    with django_capture_on_commit_callbacks(execute=True):
        detector = services.create_detector(
            team,
            "Kerb walkers",
            ["pedestrian", "people"],
            protocols=("coco", "miss-rate"),
            splits=["kerb-walk"],
        )
    version = services.create_version(detector, "1.0", users["engineer"])
    run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("dt.json", (tmp_path / "dt.json").read_bytes()),
        users["engineer"],
    )
    return {"scene": scene, "detector": detector, "version": version}


def test_the_setups_are_stored_as_the_toolbox_computes_them(walkers):
    evaluation = Evaluation.objects.get(protocol="miss-rate")
    assert evaluation.state == "done", evaluation.error
    card = evaluation.scorecard
    oracle_scene = _oracle_scene(walkers["scene"])
    for setup in SETUPS:
        expected, _ = pedestrian_oracle.toolbox(oracle_scene, setup)
        stored = card.result["levels"][setup]["classes"]["pedestrian"]["miss_rate"]
        if expected is None:
            assert stored is None, setup
        else:
            assert stored == pytest.approx(expected, rel=1e-12), setup
    reasonable = card.result["levels"]["reasonable"]["miss_rate"]
    assert card.summary == {"miss_rate": reasonable, "level": "reasonable"}
    assert card.result["lower_is_better"] is True
    assert card.result["protocol_record"]["kind"] == "setups"
    rows = SliceScore.objects.filter(scorecard=card, name="reasonable", class_name="pedestrian")
    expected = card.result["levels"]["reasonable"]["classes"]["pedestrian"]["miss_rate"]
    assert [r.miss_rate for r in rows] == [expected]  # the row in SliceScore.miss_rate


def test_a_setup_rule_is_judged_lower_is_better(walkers, users, run_tasks):
    card = Evaluation.objects.get(protocol="miss-rate").scorecard
    value = card.result["levels"]["reasonable"]["classes"]["pedestrian"]["miss_rate"]
    assert 0 < value < 1
    rule = {
        "kind": "min_value",
        "metric": "miss_rate",
        "level": "reasonable",
        "class": "pedestrian",
        "split": "*",
    }
    detector, version = walkers["detector"], walkers["version"]
    run_tasks(criteria.set_criteria, detector, users["lead"], [{**rule, "threshold": value + 0.01}])
    assert verdicts.verdict_of(version).state == "pass"
    outcome = Outcome.objects.order_by("-id").first()
    assert outcome.value == pytest.approx(value) and "maximum" in outcome.detail
    run_tasks(criteria.set_criteria, detector, users["lead"], [{**rule, "threshold": value - 0.01}])
    assert verdicts.verdict_of(version).state == "regression"
    with pytest.raises(criteria.CriteriaError, match="measured as miss_rate") as e:
        criteria.set_criteria(detector, users["lead"], [{**rule, "metric": "AP", "threshold": 0.5}])
    assert e.value.path == "rules[0].metric"


def test_a_sign_off_keeps_the_miss_rate_it_was_decided_on(walkers, users):
    """A decision's evidence keeps each evaluation's headline number: a setups result
    has no AP, so its miss rate and headline setup are kept (red team audit16 F5: the
    evidence kept "AP": null and no number for it)."""
    card = Evaluation.objects.get(protocol="miss-rate").scorecard
    record, _ = services.sign_off(
        walkers["version"], users["lead"], "rejected", "too many misses at night"
    )
    kept = {e["protocol"]: e for e in record.evidence["evaluations"]}
    assert kept["miss-rate"]["AP"] is None
    assert kept["miss-rate"]["miss_rate"] == card.summary["miss_rate"]
    assert kept["miss-rate"]["level"] == "reasonable"
    coco = Evaluation.objects.get(protocol="coco").scorecard
    assert kept["coco"]["AP"] == coco.summary["AP"] and "miss_rate" not in kept["coco"]
