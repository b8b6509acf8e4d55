"""A small copy of the demo's story behind the cause pages: forward camera 1.4 approved
as the baseline, then 1.5, which really loses pedestrians at night, fails its
no-significant-drop rule on bay-night. Built through the real services (scoring and
judging run where they are dispatched)."""

import json

from django.core.files.base import ContentFile

from evaluation import services as evaluation_services
from releases import criteria, demo, services, suites

RULE = {
    "kind": "no_significant_drop",
    "metric": "AP",
    "class": "pedestrian",
    "split": "*",
    "tag": "night",
    "confidence": 0.95,
    "tolerance": 1.0,
}


def build(users, team, run=lambda fn, *args: fn(*args), *, n_images=120):
    """``{"split", "detector", "1.4", "1.5", "truth"}``. ``run(fn, *args)`` runs a
    service so that the tasks it dispatches have run when it returns (``run_tasks``)."""
    lead, engineer = users["lead"], users["engineer"]
    truth = demo.split_truth("bay-night", 1, 12, n_images, (1280, 720), 1.0, ("harbour",))
    split = evaluation_services.load_split(
        name="bay-night",
        revision=1,
        truth=ContentFile(json.dumps(truth).encode(), name="bay-night-rev1.json"),
    )
    detector = services.create_detector(team, "Forward camera", demo.CLASSES, protocols=("coco",))
    suites.set_suite(
        detector,
        lead,
        {
            "splits": [{"name": "bay-night", "revision": None}],
            "protocols": ["coco"],
            "score_threshold": 0.5,
            "class_thresholds": {"traffic_light": 0.4},
        },
    )
    out = {"split": split, "detector": detector, "truth": truth}
    for label in ("1.4", "1.5"):
        index = demo.index_of("forward", label)
        day, night, jitter = demo.version_quality("forward", index, label)
        detections = demo.predictions(truth, day, night, jitter, (index + 1) * 1000 + 17)
        version = services.create_version(detector, label, engineer)
        run(
            services.submit_predictions,
            version,
            split,
            ContentFile(json.dumps(detections).encode(), name=f"forward-{label}.json"),
            engineer,
        )
        if label == "1.4":
            run(services.sign_off, version, lead, "approved", "The baseline.")
            run(criteria.set_criteria, detector, lead, [RULE])
        out[label] = version
    return out
