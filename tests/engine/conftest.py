import contextlib
import io
import json

import numpy as np
import pytest

from evaluation.engine import load_predictions, load_truth


class Files:
    """Writes test inputs into a temporary directory and loads them."""

    def __init__(self, root):
        self.root = root

    def write(self, name, content):
        path = self.root / name
        if isinstance(content, (dict, list)):
            content = json.dumps(content)
        path.write_text(content)
        return path

    def load(self, truth, predictions, **options):
        gt_path = self.write("truth.json", truth)
        dt_path = self.write("predictions.json", predictions)
        loaded = load_truth(gt_path)
        return loaded, load_predictions(dt_path, loaded, **options)


@pytest.fixture
def files(tmp_path):
    return Files(tmp_path)


def pycocotools_eval(gt_path, dt_path):
    """Run the reference, pycocotools 2.0.11 ``COCOeval(..., 'bbox')``, quietly."""
    from pycocotools.coco import COCO
    from pycocotools.cocoeval import COCOeval

    with contextlib.redirect_stdout(io.StringIO()):
        gt = COCO(str(gt_path))
        dt = gt.loadRes(str(dt_path))
        evaluator = COCOeval(gt, dt, "bbox")
        evaluator.evaluate()
        evaluator.accumulate()
        evaluator.summarize()
    return evaluator


def as_reference(value):
    """Our 'absent' (None) is the reference's -1."""
    return -1.0 if value is None else value


@pytest.fixture(autouse=True)
def _numpy_raises():
    """Any floating-point warning inside the engine is a bug (division by zero...)."""
    with np.errstate(all="raise"):
        yield
