"""The split's stored level summary (``levels.split_counts``) and box count read a
repeated annotation id as the references that count them do: the attribute buckets
and level counts as the KITTI devkit and the toolbox read the file (each annotation
as given: the same file with unique ids), ``miss-rate-cityscale``'s as its script
(pycocotools' copies), the box count as pycocotools scores it."""

import contextlib
import io
import json

from pycocotools.coco import COCO

from evaluation import left_out, levels
from evaluation.engine import evaluate, load_predictions, load_truth
from tests.engine.test_repeated_ids import CONVERTER, _random_split, _unique


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


def test_the_pages_line_counts_the_copies_pycocotools_makes(tmp_path):
    """The version page's line for ``counts["repeated_ids"]`` (``left_out``) says how
    many annotations each protocol read its own way. Checked against pycocotools 2.0.11:
    a copy is an annotation ``COCO.getAnnIds`` fetches whose ``loadAnns`` entry is
    another (later) annotation with its id (``anns[id]`` keeps the last one); under voc
    the same annotations are read as given (the VOC devkit never reads ids)."""
    (tmp_path / "gt.json").write_text(json.dumps(CONVERTER))
    detections = [
        {**{k: a[k] for k in ("image_id", "category_id", "bbox")}, "score": 0.9}
        for a in CONVERTER["annotations"]
    ]
    (tmp_path / "dt.json").write_text(json.dumps(detections))
    with contextlib.redirect_stdout(io.StringIO()):
        coco = COCO(str(tmp_path / "gt.json"))
    fetched = [a for i in coco.getImgIds() for a in coco.imgToAnns[i]]
    copies = sum(coco.loadAnns([a["id"]])[0] is not a for a in fetched)
    assert copies == 2
    truth = load_truth(tmp_path / "gt.json")
    predictions = load_predictions(tmp_path / "dt.json", truth)
    expected = {
        "coco": "scored as a copy of the last annotation with that id, as in pycocotools",
        "voc": "read as given (this protocol's reference never reads annotation ids), not "
        "as pycocotools' copies of the last annotation with that id",
    }
    for protocol, words in expected.items():
        lines = left_out.detection_lines(evaluate(truth, predictions, protocol)["counts"])
        repeated = [line for line in lines if "repeated id" in line]
        assert repeated == [f"{copies} annotations with a repeated id {words}"], protocol
