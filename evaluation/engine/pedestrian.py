"""Pedestrian setups for the log-average miss rate (Dollár et al., TPAMI 34(4), 2012;
Zhang et al., CVPR 2017).

The rules, in our own words, with the place in the published code that applies each
(the toolbox: ``bbGt.m`` ``evalRes`` / ``compOas`` / ``compRoc`` and ``dbEval.m``; the
city-scale benchmark: ``eval_MR_multisetup.py`` ``evaluateImg`` / ``accumulate``):

* Setups [``dbEval`` ``exps``, city-scale ``HtRng``/``VisRng``]: a ground-truth box
  counts when its height h (px) and visibility ratio v lie in the setup's closed
  ranges: reasonable h in [50, inf), v in [0.65, inf); small h in [50, 75],
  v in [0.65, inf); heavy occlusion h in [50, inf), v in [0.20, 0.65]; all
  h in [20, inf), v in [0.20, inf). A visibility not given counts as fully visible
  (the toolbox reads a box without a visible part as v = inf, which lands in the same
  setups). The city-scale reading takes the script's ``height`` and ``vis_ratio``
  (``GroundTruth.cityscale_height``: an annotation's ``height`` key where given, else
  the box's h; ``GroundTruth.cityscale_visibility``) and its test (``_prepare``: out when
  h < lo, h > hi, v < lo or v > hi), so a NaN is inside. Boxes outside the setup,
  boxes flagged crowd/ignore/difficult, boxes of a neighbouring label (``person?``,
  ``people``, ``ignore``: the toolbox's labels other than ``person``) and the split's
  don't-care regions are *ignore boxes*.
* Detections [``dbEval`` ``evalAlgs``]: kept only if h_lo / 1.25 <= h_det < h_hi * 1.25
  (the expanded height range avoids boundary effects, §3.3 of the TPAMI paper).
* Matching [``evalRes``], per image, detections by score descending (stable), ground
  truth with ignore boxes last (stable): each detection takes, among not yet matched
  regular boxes, the one with the greatest IoU >= 0.5 (the last of equals); only if
  none, the first ignore box whose intersection over the *detection's own area*
  (``compOas`` with the ignore flag) is >= 0.5 — the detection is then ignored, and an
  ignore box absorbs any number. Unmatched detections are false positives.
* Curve [``compRoc``]: every image's detections concatenated in image order (ascending
  image id here; the toolbox takes its images in its annotation files' name order), ignored
  ones dropped, stable sort by score; a point after every detection: FPPI = FP /
  images, recall = TP / counted boxes.
* Log-average miss rate [``dbEval`` ``plotExps``]:
  ``LAMR = exp(mean_k ln(max(1 - R(f_k), 1e-10)))`` over nine FPPI references.

Where the two published implementations differ (``MissRateProtocol.variant``):

``toolbox`` (default, preset ``miss-rate``): references f_k = 10^(-2 + k/4); R(f) is the
recall of the last point with FPPI <= f, a start point (FPPI -inf, recall 0) making a
budget no point meets read miss rate 1; clamp at 1e-10; every detection is used.

``cityscale`` (preset ``miss-rate-cityscale``, ``eval_MR_multisetup.py`` read line by
line: ``Params``, ``_prepare``, ``evaluateImg``, ``accumulate``, ``summarize``, and its
``coco.py`` ``loadRes``): references rounded to four decimals; only each image's top
1,000 detections by score, cut before the height filter; no clamp (a miss rate of 0
makes the LAMR 0, ``np.exp(np.mean(np.log(...)))``); and when no point lies at or below
a reference, index -1 reads the *last* recall of the curve (``np.searchsorted(...) -
1``; a file with no counted detection reads recall 0 there). Also: only the class of
category id 1 (``accumulate``'s ``catIds = [1]``, ``category_one``); ignore boxes from
the ignore flag and the setup only (``_prepare`` never reads ``iscrowd``; no
``difficult``: ``ignore_flags``); a detection matched to the regular box of annotation
id 0 is a false positive that still takes the box (``dtMatches`` holds the box's id);
open ends 1e10 (``Params``' ``1e5 ** 2``).

How the project's fields become the city-scale code's inputs: ``pedestrian_setups``,
above ``MISS_RATE_CITYSCALE``.

``caltech`` (preset ``miss-rate-caltech``): the toolbox's reading plus the box handling
of its Caltech benchmark script (``dbEval`` ``loadGt``/``loadDt``): every counted box and
every detection resized to aspect ratio 0.41 about its centre before matching (ignore
boxes keep theirs), and a counted box's height must stay *below* a finite upper bound.

Results per setup and class in the shape of ``difficulty.evaluate_levels``: setups are
its levels. A class with no counted box in a setup is absent there (None).
"""

import numpy as np

from . import cityscale_raises
from .errors import InputError
from .level_samples import LevelSamples, setup_class, setup_running_counts
from .operating_point import matlab_descending
from .pedestrian_curve import curve_points, read_references  # noqa: F401  (re-exported)
from .pedestrian_matching import (  # noqa: F401  (re-exported)
    MATLAB,
    PYTHON,
    match_image,
    overlaps,
    standardise_aspect,
)
from .pedestrian_scope import evaluated_classes, exact_order, image_count, lost_images, not_counted
from .pedestrian_setups import (  # noqa: F401  (re-exported: the engine's API)
    CITYSCALE_CATEGORY,
    CITYSCALE_FPPI_POINTS,
    CITYSCALE_HEIGHT_RANGES,
    CITYSCALE_SETUPS,
    CLAMP,
    CURVE_POINTS,
    HEIGHT_EXPANSION,
    MIN_OVERLAP,
    MISS_RATE,
    MISS_RATE_CALTECH,
    MISS_RATE_CITYSCALE,
    MISS_RATE_PRESETS,
    SETUPS,
    MissRateProtocol,
    Setup,
    category_one,
    get_miss_rate_protocol,
    ignore_flags,
    neighbours_of,
    setup_height,
    setup_visibility,
)
from .sequential_walk import refuse_box_id


def _group(index, n):
    order = np.argsort(index, kind="stable")
    bounds = np.searchsorted(index[order], np.arange(n + 1))
    return [order[bounds[i] : bounds[i + 1]] for i in range(n)]


def evaluate_setups(truth, predictions, protocol="miss-rate"):
    """Log-average miss rate per setup and class (see the module docstring).

    Returns ``{"protocol": record, "n_images": N, "levels": {setup: {"classes": {class:
    {"miss_rate", "n_gt", "reference_miss_rate", "curve", "detections"}}, "miss_rate"}},
    "headline": float|None}``: the shape of ``difficulty.evaluate_levels`` with setups
    as levels; a setup's ``miss_rate`` is the mean over the classes present there, the
    headline the reasonable setup's. Lower is better.
    """
    return evaluate_setups_with_samples(truth, predictions, protocol)[0]


def evaluate_setups_with_samples(truth, predictions, protocol="miss-rate"):
    """``(evaluate_setups' output, level_samples.LevelSamples)``: each miss rate is
    computed from the samples (``level_samples.setup_class`` at weights of one), so a
    weighted recomputation at weights of one equals it bit for bit."""
    protocol = get_miss_rate_protocol(protocol)
    # integer scores the CityPersons script orders otherwise (loaders.exact_scores): its
    # order is taken; the toolbox variants read MATLAB doubles, as float64 here
    conflict = predictions.cityscale_conflict() if protocol.variant == "cityscale" else None
    if conflict:  # a record made before the order was kept
        where = {k: v for k, v in conflict.items() if k in ("record", "field")}
        raise InputError(conflict["path"], conflict["message"], **where)
    if protocol.variant == "cityscale":  # a value the script raises on, where it does
        cityscale_raises.check(truth, predictions, protocol)
    exact = exact_order(predictions, protocol)
    n_images = truth.n_images
    lost = lost_images(truth, protocol)
    flagged = not_counted(truth, protocol)
    void = truth.zero_id_boxes() if protocol.variant == "cityscale" else None
    fraction = truth.cityscale_ignore()[1] if void is not None else None
    bad_ids = [{e[0]: e for e in truth.cityscale_faults.get("id", ())}] if void is not None else []
    bad_ids = [faults for faults in bad_ids if faults]
    script = protocol.variant == "cityscale"
    left_out = truth.left_out_boxes(True) if script else None
    height = setup_height(truth, protocol)
    visibility = setup_visibility(truth, protocol)
    det_height = predictions.boxes[:, 3]
    det_boxes = predictions.boxes
    gt_resized = None
    if protocol.aspect_ratio is not None:
        det_boxes = standardise_aspect(det_boxes, protocol.aspect_ratio)
        gt_resized = standardise_aspect(truth.boxes, protocol.aspect_ratio)
    gt_by_image = _group(truth.box_image, n_images)
    det_by_image = _group(predictions.image, n_images)
    det_alias = predictions.alias_detections()
    region_by_image = _group(truth.region_image, n_images)
    levels = {s.name: {} for s in protocol.setups}
    parts, classes = {}, []
    for k, near in evaluated_classes(truth, protocol):
        classes.append(truth.classes[k])
        own = truth.box_class == k
        part = own | np.isin(truth.box_class, near)
        alias = truth.alias_boxes()
        found = None if left_out is None else ~left_out  # what _gts holds (the script)
        if not script:  # under a changed value: the toolbox keeps every id, leaves it out
            own, part = own & ~alias, part & ~alias
        if truth.repeated is not None:  # a repeated id: the script reads pycocotools'
            unread = truth.repeated_left_out(script)  # copies, the toolbox each as given
            own, part = own & ~unread, part & ~unread
        scenes = []  # per image: its boxes of the class or a neighbour, its detections
        for image in range(n_images):
            g = gt_by_image[image]
            g = g[part[g]]
            if lost is not None and lost[image]:  # the script's _gts[C, 1]: alias boxes
                if found is not None and found[g].any():  # only, no detection (loadRes)
                    scenes.append((image, g[found[g]], g[:0]))
                continue
            d = det_by_image[image]
            d = d[(predictions.cls[d] == k) & ~det_alias[d]]
            if protocol.variant == "toolbox":  # MATLAB's sort: NaN scores first
                d = d[matlab_descending(predictions.score[d])]
            elif exact is not None and len(d) and exact[0][d[0]] >= 0:  # the script's ranks
                d = d[np.argsort(exact[0][d], kind="stable")]
            else:  # the city-scale code's numpy argsort: NaN last
                d = d[np.argsort(-predictions.score[d], kind="stable")]
            if protocol.max_detections is not None:
                d = d[: protocol.max_detections]
            scenes.append((image, g, d))
        for setup in protocol.setups:
            inside = setup.counts(height, visibility, protocol.height_upper_open, script)
            counted = own & inside & ~flagged
            keep = setup.keeps(det_height, HEIGHT_EXPANSION)
            # the city-scale code: boxes of id 0, and in-setup boxes whose fractional
            # ignore key makes int(ignore) = 0 (plain IoU although ignored)
            city = None if void is None else (void, own & inside & fraction, *bad_ids)
            order_key = None if exact is None else exact[1].get(setup.height)
            levels[setup.name][truth.classes[k]], parts[(setup.name, truth.classes[k])] = (
                _class_result(
                    truth,
                    predictions,
                    scenes,
                    counted,
                    keep,
                    region_by_image,
                    protocol,
                    det_boxes,
                    gt_resized,
                    city,
                    order_key,
                )
            )
    summary = {name: _setup_summary(per_class) for name, per_class in levels.items()}
    output = {
        "protocol": protocol.record(),
        "n_images": image_count(truth, protocol),
        "levels": summary,
        "headline": summary.get(protocol.headline_level, {}).get("miss_rate"),
    }
    setups = [s.name for s in protocol.setups]
    return output, LevelSamples("setups", protocol, n_images, setups, classes, parts)


def _class_result(
    truth,
    predictions,
    scenes,
    counted,
    keep,
    region_by_image,
    protocol,
    det_boxes,
    gt_resized,
    city,
    order_key=None,
):
    n_gt = int(np.count_nonzero(counted))
    scores, outcomes, det_image, keys = [], [], [], []
    dropped = 0
    for image, g, d in scenes:
        kept = d[keep[d]]
        dropped += len(d) - len(kept)
        if not len(kept):
            continue
        regions = truth.regions[region_by_image[image]]
        gt_boxes = truth.boxes[g]
        if gt_resized is not None:  # only counted boxes are resized (dbEval loadGt)
            gt_boxes = np.where(counted[g][:, None], gt_resized[g], gt_boxes)
        boxes = np.concatenate([gt_boxes, regions])
        ignored = np.r_[~counted[g], np.ones(len(regions), bool)]
        box_void = None
        if city is None:
            oa = overlaps(det_boxes[kept], boxes, ignored)
        else:
            void, plain = city[:2]
            no = np.zeros(len(regions), bool)
            oa = overlaps(det_boxes[kept], boxes, ignored & ~np.r_[plain[g], no], PYTHON)
            box_void = np.r_[void[g], no]
        taken = [] if city is not None and len(city) > 2 else None
        outcomes.extend(match_image(oa.tolist(), ignored.tolist(), box_void, taken))
        if taken:  # the script's dtm[tind, dind] = gt[bstg]["id"] (``unwritable_id``)
            _refuse_unwritable_id(truth, city[2], g[[b for b in taken if b < len(g)]])
        scores.extend(predictions.score[kept].tolist())
        det_image.extend([image] * len(kept))
        if order_key is not None:
            keys.append(order_key[kept])
    samples = {
        "n_gt": np.bincount(truth.box_image[counted], minlength=truth.n_images).astype(np.int64),
        "det_image": np.asarray(det_image, np.int32),
        "det_score": np.asarray(scores, np.float64),
        "det_outcome": np.asarray(outcomes, np.int8),
    }
    counted_images = truth.unique_counted_images() if city is not None else None
    if counted_images is not None:  # the script's I0: ids np.unique merged count once
        samples["fppi_image"] = counted_images
    if order_key is not None:  # the CityPersons script's exact order (level_samples)
        samples["det_key"] = np.concatenate(keys) if keys else np.zeros(0)
    tp, fp, _, _ = setup_running_counts(samples)
    use = samples["det_outcome"] != -1
    detections = {
        "true_positive": int(tp[-1]) if len(tp) else 0,
        "false_positive": int(fp[-1]) if len(fp) else 0,
        "ignored": int((~use).sum()),
        "outside_height": int(dropped),
    }
    if n_gt == 0:
        return {
            "miss_rate": None,
            "n_gt": n_gt,
            "reference_miss_rate": None,
            "curve": {"fppi": [], "miss_rate": []},
            "detections": detections,
        }, samples
    miss, lamr = setup_class(samples, protocol)
    return {
        "miss_rate": lamr,
        "n_gt": n_gt,
        "reference_miss_rate": miss.tolist(),
        "curve": curve_points(tp, fp, n_gt, image_count(truth, protocol)),
        "detections": detections,
    }, samples


def _refuse_unwritable_id(truth, faults, boxes):
    """The CityPersons script's ``evaluateImg`` writes a matched box's id into the float
    ``dtm`` (``dtm[tind, dind] = gt[bstg]["id"]``, a regular or an ignore box): an id
    numpy cannot write (``GroundTruth.cityscale_faults["id"]``) raises there, so the
    file is refused, naming its record."""
    hit = [int(b) for b in boxes if int(b) in faults]
    if hit:
        refuse_box_id(
            truth,
            faults[hit[0]],
            "the CityPersons script raises there (evaluateImg: "
            'dtm[tind, dind] = gt[bstg]["id"], ValueError)',
        )


def _setup_summary(per_class):
    present = [r["miss_rate"] for r in per_class.values() if r["miss_rate"] is not None]
    return {"classes": per_class, "miss_rate": float(np.mean(present)) if present else None}


def setup_counts(truth, protocol="miss-rate"):
    """Counted boxes per setup and evaluated class (the ``n_gt`` of
    ``evaluate_setups``), for a split's page: ``{setup: {class: n}}``."""
    protocol = get_miss_rate_protocol(protocol)
    flagged = not_counted(truth, protocol)
    height = setup_height(truth, protocol)
    visibility = setup_visibility(truth, protocol)
    script = protocol.variant == "cityscale"
    out = {}
    for setup in protocol.setups:
        inside = setup.counts(height, visibility, protocol.height_upper_open, script)
        inside &= ~flagged
        out[setup.name] = {
            truth.classes[k]: int(np.count_nonzero(inside & (truth.box_class == k)))
            for k, _ in evaluated_classes(truth, protocol)
        }
    return out


def setups_table(result):
    """A plain-text table of ``evaluate_setups``' result: LAMR per setup and class."""
    rows = [f"{'setup':<12}{'class':<16}{'n_gt':>6}{'MR':>9}{'TP':>7}{'FP':>7}"]
    show = lambda v: "-" if v is None else f"{v:.4f}"  # noqa: E731
    for setup, entry in result["levels"].items():
        for name, r in entry["classes"].items():
            det = r["detections"]
            rows.append(
                f"{setup:<12}{name:<16}{r['n_gt']:>6}{show(r['miss_rate']):>9}"
                f"{det['true_positive']:>7}{det['false_positive']:>7}"
            )
        rows.append(f"{setup:<12}{'mean':<16}{'':>6}{show(entry['miss_rate']):>9}")
    record = result["protocol"]
    rows.append(
        f"headline ({record['name']}, {record['headline_level']} log-average miss rate, "
        f"lower is better): {show(result['headline'])}"
    )
    return "\n".join(rows)
