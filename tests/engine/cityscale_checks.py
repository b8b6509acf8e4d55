"""City-scale ground truth written as files, and the engine's ``miss-rate-cityscale``
setups checked against ``pedestrian_oracle.cityscale_coco`` (the city-scale
benchmark's ``eval_MR_multisetup.py`` transliterated) setup by setup, exactly."""

import json

from evaluation.engine import load_predictions
from evaluation.engine.pedestrian import evaluate_setups

from . import pedestrian_oracle

SETUPS = ("reasonable", "small", "heavy", "all")


def write_files(root, dataset, results=None, name="gt.json"):
    """``dataset`` as ``root/name`` (NaN and Infinity written as those literals, as
    Python's json writes them) and, if given, ``results`` as ``root/dt.json``."""
    gt = root / name
    gt.write_text(json.dumps(dataset))
    if results is None:
        return gt
    dt = root / "dt.json"
    dt.write_text(json.dumps(results))
    return gt, dt


def setups_as_script(truth, dt, script_dataset, results):
    """The engine's setups for ``truth`` and the results file ``dt``: every setup's value
    and nine miss rates equal the transliteration's ``summarize`` on
    ``script_dataset`` and ``results`` (the same content as the script reads it); the
    engine's result."""
    ours = evaluate_setups(truth, load_predictions(dt, truth), "miss-rate-cityscale")
    for setup in SETUPS:
        mean_s, mrs = pedestrian_oracle.cityscale_coco(
            script_dataset, results, pedestrian_oracle.SETUP_IDS[setup]
        )
        level = ours["levels"][setup]
        if mrs is None:
            assert level["miss_rate"] is None, setup
            continue
        assert level["miss_rate"] == mean_s, (setup, level["miss_rate"], mean_s)
        assert level["classes"]["pedestrian"]["reference_miss_rate"] == mrs, setup
    return ours
