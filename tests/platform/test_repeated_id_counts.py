"""The split's stored level summary (``levels.split_counts``) and box count read a
repeated annotation id as the references that count them do: the attribute buckets
and level counts as the KITTI devkit and the toolbox read the file (each annotation
as given: the same file with unique ids), ``miss-rate-cityscale``'s as its script
(pycocotools' copies), the box count as pycocotools scores it."""

import json

from evaluation import levels
from evaluation.engine import load_truth
from tests.engine.test_repeated_ids import _random_split, _unique


def test_the_level_summary_reads_each_annotation_as_given(tmp_path):
    split, _ = _random_split(4)
    (tmp_path / "gt.json").write_text(json.dumps(split))
    (tmp_path / "unique.json").write_text(json.dumps(_unique(split)))
    truth, unique = load_truth(tmp_path / "gt.json"), load_truth(tmp_path / "unique.json")
    assert truth.repeated is not None
    ours, theirs = levels.split_counts(truth), levels.split_counts(unique)
    city = ours["protocols"].pop("miss-rate-cityscale")
    assert city != theirs["protocols"].pop("miss-rate-cityscale")  # the copies move it
    assert ours == theirs
    assert truth.n_boxes_read() == truth.n_boxes - (truth.repeated == 2).sum()
    assert truth.n_boxes_read(copies=False) == unique.n_boxes
