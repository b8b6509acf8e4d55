"""Slow, literal transliterations of the published algorithms, for cross-checks.

``greedy_ap`` follows pycocotools 2.0.11 ``COCOeval.evaluateImg`` + ``accumulate``
line by line (generalised to per-class thresholds, any recall points, any cap);
``voc_ap`` follows the PASCAL VOC devkit ``VOCevaldet.m`` and ``VOCap.m``. Plain
loops, no vectorisation: easy to check against the source by eye.
"""

import numpy as np


def _iou(d, g, crowd, offset):
    iw = min(d[0] + d[2], g[0] + g[2]) - max(d[0], g[0]) + offset
    ih = min(d[1] + d[3], g[1] + g[3]) - max(d[1], g[1]) + offset
    if iw <= 0 or ih <= 0:
        return 0.0
    inter = iw * ih
    da = (d[2] + offset) * (d[3] + offset)
    ga = (g[2] + offset) * (g[3] + offset)
    return inter / (da if crowd else da + ga - inter)


def _sorted_detections(predictions, image, k):
    idx = [
        i
        for i in range(len(predictions))
        if predictions.image[i] == image and predictions.cls[i] == k
    ]
    return sorted(idx, key=lambda i: -predictions.score[i])  # stable: file order on ties


def greedy_ap(
    truth,
    predictions,
    *,
    thresholds,
    recall_points,
    max_detections,
    epsilon,
    outcomes=None,
    difficult=True,
):
    """AP per (slot, class) under the pycocotools rules, area 'all'. NaN = absent.
    ``difficult``: whether a box flagged difficult is ignored like a crowd one (the
    generalisation to VOC-style flags; pycocotools itself never reads the flag).

    With a dict ``outcomes``, ``outcomes[k]`` is set to ``(scores, tp, ignored, n_pos)``
    of slot 0, in pycocotools' concatenation order: images in id order, each image's
    detections by score (stable)."""
    n_classes = len(truth.classes)
    out = np.full((len(thresholds), n_classes), np.nan)
    for k in range(n_classes):
        per_slot = [[] for _ in thresholds]  # (score, image, order, tp, ignored)
        n_pos = 0
        for image in range(truth.n_images):
            gts = [
                j
                for j in range(truth.n_boxes)
                if truth.box_image[j] == image and truth.box_class[j] == k
            ]
            # evaluateImg: g['ignore'] or the area outside aRng ('all': [0, 1e10])
            ignore = {
                j: bool(truth.crowd[j] or truth.ignore[j] or (difficult and truth.difficult[j]))
                or not 0 <= truth.box_area[j] <= 1e10
                for j in gts
            }
            gts = sorted(gts, key=lambda j: ignore[j])  # stable: regular boxes first
            n_pos += sum(not ignore[j] for j in gts)
            dets = _sorted_detections(predictions, image, k)
            if max_detections is not None:
                dets = dets[:max_detections]
            for t, thr_of in enumerate(thresholds):
                thr = min(thr_of[k], 1 - 1e-10)
                taken = set()
                for order, d in enumerate(dets):
                    best, m = thr, None
                    for g in gts:
                        if g in taken and not truth.crowd[g]:
                            continue
                        if m is not None and not ignore[m] and ignore[g]:
                            break
                        iou = _iou(predictions.boxes[d], truth.boxes[g], truth.crowd[g], 0.0)
                        if iou < best:
                            continue
                        best, m = iou, g
                    if m is not None:
                        taken.add(m)
                    # unmatched and outside the area range: ignored (loadRes: area w*h)
                    w, h = predictions.boxes[d][2:]
                    outside = m is None and not 0 <= w * h <= 1e10
                    per_slot[t].append(
                        (
                            -predictions.score[d],
                            image,
                            order,
                            m is not None and not ignore[m],
                            (m is not None and ignore[m]) or outside,
                        )
                    )
        if outcomes is not None:
            rows = per_slot[0]
            outcomes[k] = ([-r[0] for r in rows], [r[3] for r in rows], [r[4] for r in rows], n_pos)
        if n_pos == 0:
            continue
        for t, rows in enumerate(per_slot):
            rows.sort(key=lambda r: r[0])  # stable over (image, order)
            tp = fp = 0
            recall, precision = [], []
            for _, _, _, is_tp, ignored in rows:
                if not ignored:
                    tp += is_tp
                    fp += not is_tp
                recall.append(tp / n_pos)
                precision.append(tp / (fp + tp + epsilon) if epsilon or tp + fp else 0.0)
            for i in range(len(precision) - 1, 0, -1):
                precision[i - 1] = max(precision[i - 1], precision[i])
            q = []
            for r in recall_points:
                reach = [i for i, rc in enumerate(recall) if rc >= r]
                q.append(precision[reach[0]] if reach else 0.0)
            out[t, k] = np.mean(q)
    return out


def matlab_colon(a, d, b):
    """MATLAB's ``a:d:b`` for floating-point steps, as MathWorks documents its colon
    algorithm (``colonop.m``, support solution 1-4FLI96, quoted in MATLAB Answers
    "Floating Point Accuracy and COLON", 2012): n = round((b - a) / d) intervals; the
    first half is a + k*d, the second half b - (n - k)*d; the middle (n even)
    (a + b) / 2 (that last detail from memory; it changes neither 0:0.1:1 nor
    -2:0.25:0)."""
    n = round((b - a) / d)
    out = [0.0] * (n + 1)
    for k in range(n // 2 + 1):
        out[k] = a + k * d
        out[n - k] = b - k * d
    if n % 2 == 0:
        out[n // 2] = (a + b) / 2
    return out


def voc_ap(truth, predictions, *, eleven_point, min_overlap=0.5, outcomes=None):
    """AP per class, transliterated from the PASCAL VOC devkit's ``VOCevaldet.m`` (and
    the VOC2007 11-point loop in it) and ``VOCap.m``, written from the published
    code's logic: the class's whole results file sorted by ``sort(-confidence)``
    (MATLAB's sort is stable: ties keep file order); for each detection, the box of
    largest overlap among all of its image's boxes of the class (``ov > ovmax``: the
    first maximum); ``ovmax >= minoverlap`` -> difficult: neither, free: TP, taken:
    FP; else FP. Inclusive pixel boxes (+1). 11-point: ``for t=0:0.1:1``,
    ``p=max(prec(rec>=t))`` (0 if empty; NaN where every selected prec is 0/0: the
    class is then NaN, which the engine reports absent), ``ap=ap+p/11``.

    The devkit knows no crowd regions; like the engine, treat them (and boxes flagged
    ``ignore``) as difficult. Boxes here are [x, y, w, h] with x_max = x + w.

    With a dict ``outcomes``, ``outcomes[k]`` is set to ``(scores, tp, ignored, npos)``
    of the devkit's matching, in the pedestrian toolbox's concatenation order for
    ``toolbox_miss_rate``: images in order, each image's detections in the devkit's
    sorted order (a detection on a difficult box is neither TP nor FP: ignored).
    """
    with np.errstate(all="ignore"):  # IEEE arithmetic, as MATLAB's (inf - inf is NaN)
        return _voc_ap(truth, predictions, eleven_point, min_overlap, outcomes)


def _voc_ap(truth, predictions, eleven_point, min_overlap, outcomes):
    out = np.full(len(truth.classes), np.nan)
    difficult = truth.difficult | truth.crowd | truth.ignore
    for k in range(len(truth.classes)):
        boxes = [j for j in range(truth.n_boxes) if truth.box_class[j] == k]
        npos = sum(not difficult[j] for j in boxes)
        if npos == 0:
            continue
        # the class's results file, in file order
        ids = [i for i in range(len(predictions)) if predictions.cls[i] == k]
        confidence = [predictions.score[i] for i in ids]
        # stable, like MATLAB's sort, which puts NaN last in ascending order (MathWorks
        # documentation of sort; -NaN is NaN, so a NaN confidence ranks last)
        si = sorted(range(len(ids)), key=lambda d: (np.isnan(confidence[d]), -confidence[d]))
        ids = [ids[d] for d in si]
        det = set()
        nd = len(ids)
        tp, fp = np.zeros(nd), np.zeros(nd)
        for d in range(nd):
            i = ids[d]
            bx, by, bw, bh = predictions.boxes[i]
            bb = (bx, by, bx + bw, by + bh)
            ovmax, jmax = -np.inf, None
            for j in (j for j in boxes if truth.box_image[j] == predictions.image[i]):
                gx, gy, gw, gh = truth.boxes[j]
                ov = _devkit_overlap(bb, (gx, gy, gx + gw, gy + gh))
                if ov is not None and ov > ovmax:
                    ovmax, jmax = ov, j
            if ovmax >= min_overlap:
                if not difficult[jmax]:
                    if jmax not in det:
                        tp[d] = 1
                        det.add(jmax)
                    else:
                        fp[d] = 1
            else:
                fp[d] = 1
        if outcomes is not None:
            # in the toolbox's concatenation: images in order (``dt=cat(1,dt{:})``), each
            # image's detections in the devkit's sorted order (score, then file order)
            by_image = sorted(range(nd), key=lambda d: predictions.image[ids[d]])  # stable
            scores = [predictions.score[ids[d]] for d in by_image]
            outcomes[k] = (
                scores,
                [bool(tp[d] == 1) for d in by_image],
                [bool(tp[d] == 0 and fp[d] == 0) for d in by_image],
                npos,
            )
        out[k] = _devkit_ap(tp, fp, npos, eleven_point)
    return out


def _devkit_overlap(bb, bbgt):
    """``VOCevaldet.m``'s overlap of a detection's and a box's corners, None where
    they do not intersect (``iw>0 && ih>0`` fails): ``bi=[max(bb(1),bbgt(1)) ; ... ;
    min(bb(4),bbgt(4))]``, ``iw=bi(3)-bi(1)+1``, ``ih=bi(4)-bi(2)+1``, ``ua`` from each
    box's own corners (+1), ``ov=iw*ih/ua``. MATLAB's max/min omit NaN (MathWorks
    documentation, 'omitnan' the default): np.fmax/np.fmin, not Python's max/min;
    MATLAB reads the corners as doubles."""
    bb, bbgt = np.asarray(bb[:4], np.float64), np.asarray(bbgt[:4], np.float64)
    bi = (
        np.fmax(bb[0], bbgt[0]),
        np.fmax(bb[1], bbgt[1]),
        np.fmin(bb[2], bbgt[2]),
        np.fmin(bb[3], bbgt[3]),
    )
    iw = bi[2] - bi[0] + 1
    ih = bi[3] - bi[1] + 1
    if not (iw > 0 and ih > 0):
        return None
    ua = (
        (bb[2] - bb[0] + 1) * (bb[3] - bb[1] + 1)
        + (bbgt[2] - bbgt[0] + 1) * (bbgt[3] - bbgt[1] + 1)
        - iw * ih
    )
    return iw * ih / ua


def _devkit_ap(tp, fp, npos, eleven_point):
    """``VOCevaldet.m``'s AP from the per-detection tp/fp flags in sorted order: the
    VOC2007 11-point loop, or ``VOCap.m``'s all-point area."""
    fp, tp = np.cumsum(fp), np.cumsum(tp)
    rec = tp / npos
    with np.errstate(invalid="ignore", divide="ignore"):
        prec = tp / (fp + tp)  # NaN before the first counted detection
    if eleven_point:
        ap = 0.0
        for t in matlab_colon(0, 0.1, 1):
            # p=max(prec(rec>=t)); if isempty(p), p=0; end: MATLAB's max omits NaN
            # unless every element is NaN, then it is NaN (MathWorks documentation
            # of max; from memory), so a class whose detections are all ignored
            # (tp = fp = 0: prec all 0/0) gets ap NaN; leading NaNs before the
            # first counted detection are omitted
            sel = prec[rec >= t]
            if not len(sel):
                p = 0.0
            elif np.isnan(sel).all():
                p = np.nan
            else:
                p = np.nanmax(sel)
            ap = ap + p / 11
    else:
        mrec = np.r_[0.0, rec, 1.0]
        mpre = np.r_[0.0, np.nan_to_num(prec, nan=0.0), 0.0]
        for i in range(len(mpre) - 2, -1, -1):
            mpre[i] = max(mpre[i], mpre[i + 1])
        i = np.flatnonzero(mrec[1:] != mrec[:-1]) + 1
        ap = float(np.sum((mrec[i] - mrec[i - 1]) * mpre[i]))
    return ap


def voc_evaldet(gt, detections, *, eleven_point, min_overlap=0.5):
    """One class's AP as ``VOCevaldet.m`` computes it from the corners as read,
    written from the published code's logic (PASCAL VOC devkit): ``gt`` maps an image
    id to its boxes ``(xmin, ymin, xmax, ymax, difficult)`` (``PASreadrecord``'s
    ``bbox``, corners as the annotation gives them), ``detections`` are the result
    file's lines ``(image id, confidence, xmin, ymin, xmax, ymax)`` in file order
    (``textread``). Overlap: ``bi=[max(bb(1),bbgt(1)) ; ... ; min(bb(4),bbgt(4))]``,
    ``iw=bi(3)-bi(1)+1``, ``ih=bi(4)-bi(2)+1``, ``ua`` from each box's own corners
    (+1), ``ov=iw*ih/ua``; no ``x + w`` anywhere, so an overlap at exactly the
    threshold is decided on the corners read. AP: ``_devkit_ap`` (the 11-point loop
    or ``VOCap.m``)."""
    npos = sum(not box[4] for boxes in gt.values() for box in boxes)
    taken = {image: [False] * len(boxes) for image, boxes in gt.items()}
    order = sorted(range(len(detections)), key=lambda d: -detections[d][1])  # stable
    tp, fp = np.zeros(len(order)), np.zeros(len(order))
    with np.errstate(all="ignore"):
        for d, i in enumerate(order):
            image, _, *bb = detections[i]
            ovmax, jmax = -np.inf, None
            for j, bbgt in enumerate(gt.get(image, ())):
                ov = _devkit_overlap(bb, bbgt)
                if ov is not None and ov > ovmax:
                    ovmax, jmax = ov, j
            if ovmax >= min_overlap:
                if not gt[image][jmax][4]:
                    if not taken[image][jmax]:
                        tp[d] = 1
                        taken[image][jmax] = True
                    else:
                        fp[d] = 1
            else:
                fp[d] = 1
        return _devkit_ap(tp, fp, npos, eleven_point)


def matlab_descending_key(value):
    """Sort key of MATLAB's ``sort(..., 'descend')``: NaN first (MathWorks ``sort``
    documentation, missing values placed first in descending order; from memory),
    then larger values first; Python's ``sorted`` is stable like MATLAB's."""
    return (0, 0.0) if np.isnan(value) else (1, -value)


def toolbox_miss_rate(scores, matched, ignored, npos, n_images):
    """Log-average miss rate, transliterated from the pedestrian detection toolbox of
    Dollár et al. (TPAMI 2012), written from the published code's logic: ``bbGt``
    ``compRoc`` and ``dbEval``. Detections of every image concatenated in image
    order (``dt=cat(1,dt{:})``), ignored ones dropped (``dt(:,6)~=-1``), sorted by
    ``sort(score,'descend')`` (stable); ``fp=cumsum(tp~=1)``, ``tp=cumsum(tp)``;
    ``xs=fp/nImg``, ``ys=tp/np``, ``xs1=[-Inf; xs]``, ``ys1=[0; ys]``; for each
    ``ref=10.^(-2:.25:0)``, ``ys1`` at the last ``xs1 <= ref``; miss rate
    ``exp(mean(log(max(1e-10, 1-ref))))``."""
    keep = [d for d in range(len(scores)) if not ignored[d]]
    order = sorted(keep, key=lambda d: matlab_descending_key(scores[d]))  # stable
    tp = np.cumsum([1 if matched[d] else 0 for d in order])
    fp = np.cumsum([0 if matched[d] else 1 for d in order])
    xs1 = np.r_[-np.inf, fp / n_images]
    ys1 = np.r_[0.0, tp / npos]
    refs = []
    for r in matlab_colon(-2, 0.25, 0):
        ref = 10.0**r
        j = [i for i in range(len(xs1)) if xs1[i] <= ref]
        refs.append(ys1[j[-1]])
    return float(np.exp(np.mean(np.log(np.maximum(1e-10, 1 - np.array(refs))))))


# KITTI object devkit, 2D image boxes ---------------------------------------------------
#
# Written from the published logic of the KITTI object development kit's
# ``cpp/evaluate_object.cpp`` (Geiger et al., CVPR 2012): ``cleanData``,
# ``computeStatistics``, ``getThresholds``, ``eval_class`` and ``imageBoxOverlap``, one
# Python function each, loop for loop, in the devkit's own terms: per image a list of
# ground-truth objects ``(type, x1, y1, x2, y2, truncation, occlusion)`` (DontCare
# regions included, as in a label file) and of detections ``(type, x1, y1, x2, y2,
# score)``; easy/moderate/hard = difficulty 0/1/2.

KITTI_MIN_HEIGHT = (40, 25, 25)
KITTI_MAX_OCCLUSION = (0, 1, 2)
KITTI_MAX_TRUNCATION = (0.15, 0.3, 0.5)
KITTI_MIN_OVERLAP = {"car": 0.7, "pedestrian": 0.5, "cyclist": 0.5}
KITTI_N_SAMPLE_PTS = 41
_NO_DETECTION = -10000


def kitti_box_overlap(a, b, criterion=-1):
    """``imageBoxOverlap``: -1 IoU, 0 over a's own area, 1 over b's; 0 if disjoint."""
    x1, y1 = max(a[1], b[1]), max(a[2], b[2])
    x2, y2 = min(a[3], b[3]), min(a[4], b[4])
    w, h = x2 - x1, y2 - y1
    if w <= 0 or h <= 0:
        return 0
    inter = w * h
    a_area = (a[3] - a[1]) * (a[4] - a[2])
    b_area = (b[3] - b[1]) * (b[4] - b[2])
    if criterion == -1:
        return inter / (a_area + b_area - inter)
    return inter / (a_area if criterion == 0 else b_area)


def kitti_clean_data(cls, gt, det, difficulty):
    """``cleanData``: (ignored_gt, dontcare, ignored_det, n_gt) for one image."""
    ignored_gt, dc, ignored_det, n_gt = [], [], [], 0
    for g in gt:
        height = g[4] - g[2]
        if g[0].lower() == cls:
            valid_class = 1
        elif cls == "pedestrian" and g[0].lower() == "person_sitting":
            valid_class = 0
        elif cls == "car" and g[0].lower() == "van":
            valid_class = 0
        else:
            valid_class = -1
        ignore = (
            g[6] > KITTI_MAX_OCCLUSION[difficulty]
            or g[5] > KITTI_MAX_TRUNCATION[difficulty]
            or height <= KITTI_MIN_HEIGHT[difficulty]
        )
        if valid_class == 1 and not ignore:
            ignored_gt.append(0)
            n_gt += 1
        elif valid_class == 0 or (ignore and valid_class == 1):
            ignored_gt.append(1)
        else:
            ignored_gt.append(-1)
    for g in gt:
        if g[0].lower() == "dontcare":
            dc.append(g)
    for d in det:
        valid_class = 1 if d[0].lower() == cls else -1
        height = int(abs(d[2] - d[4]))  # int32_t height = fabs(...): truncated
        if height < KITTI_MIN_HEIGHT[difficulty]:
            ignored_det.append(1)
        elif valid_class == 1:
            ignored_det.append(0)
        else:
            ignored_det.append(-1)
    return ignored_gt, dc, ignored_det, n_gt


def kitti_compute_statistics(cls, gt, det, dc, ignored_gt, ignored_det, compute_fp, thresh=0):
    """``computeStatistics`` without orientation: dict tp, fp, fn, v (TP scores)."""
    min_overlap = KITTI_MIN_OVERLAP[cls]
    stat = {"tp": 0, "fp": 0, "fn": 0, "v": []}
    assigned = [False] * len(det)
    below = [compute_fp and d[5] < thresh for d in det]
    for i, g in enumerate(gt):
        if ignored_gt[i] == -1:
            continue
        det_idx, valid_detection, max_overlap = -1, _NO_DETECTION, 0
        assigned_ignored_det = False
        for j, d in enumerate(det):
            if ignored_det[j] == -1 or assigned[j] or below[j]:
                continue
            overlap = kitti_box_overlap(d, g, -1)
            if not compute_fp and overlap > min_overlap and d[5] > valid_detection:
                det_idx, valid_detection = j, d[5]
            elif (
                compute_fp
                and overlap > min_overlap
                and (overlap > max_overlap or assigned_ignored_det)
                and ignored_det[j] == 0
            ):
                max_overlap, det_idx, valid_detection = overlap, j, 1
                assigned_ignored_det = False
            elif (
                compute_fp
                and overlap > min_overlap
                and valid_detection == _NO_DETECTION
                and ignored_det[j] == 1
            ):
                det_idx, valid_detection = j, 1
                assigned_ignored_det = True
        if valid_detection == _NO_DETECTION and ignored_gt[i] == 0:
            stat["fn"] += 1
        elif valid_detection != _NO_DETECTION and (ignored_gt[i] == 1 or ignored_det[det_idx] == 1):
            assigned[det_idx] = True
        elif valid_detection != _NO_DETECTION:
            stat["tp"] += 1
            stat["v"].append(det[det_idx][5])
            assigned[det_idx] = True
    if compute_fp:
        for j in range(len(det)):
            if not (assigned[j] or ignored_det[j] == -1 or ignored_det[j] == 1 or below[j]):
                stat["fp"] += 1
        nstuff = 0
        for region in dc:
            for j, d in enumerate(det):
                if assigned[j] or ignored_det[j] in (-1, 1) or below[j]:
                    continue
                if kitti_box_overlap(d, region, 0) > min_overlap:
                    assigned[j] = True
                    nstuff += 1
        stat["fp"] -= nstuff
    return stat


def kitti_get_thresholds(v, n_groundtruth):
    """``getThresholds``: scores at (about) every 1/40 step of recall."""
    v = sorted(v, reverse=True)
    t, current_recall = [], 0.0
    for i in range(len(v)):
        l_recall = (i + 1) / n_groundtruth
        r_recall = (i + 2) / n_groundtruth if i < len(v) - 1 else l_recall
        if (r_recall - current_recall) < (current_recall - l_recall) and i < len(v) - 1:
            continue
        t.append(v[i])
        current_recall += 1.0 / (KITTI_N_SAMPLE_PTS - 1.0)
    return t


def kitti_eval_class(cls, groundtruth, detections, difficulty):
    """``eval_class``: the 41 precision values (max from the right) and n_gt."""
    n_gt, v, cleaned = 0, [], []
    for gt, det in zip(groundtruth, detections):
        i_gt, dc, i_det, n = kitti_clean_data(cls, gt, det, difficulty)
        n_gt += n
        cleaned.append((i_gt, dc, i_det))
        v += kitti_compute_statistics(cls, gt, det, dc, i_gt, i_det, False)["v"]
    thresholds = kitti_get_thresholds(v, n_gt)
    pr = [{"tp": 0, "fp": 0, "fn": 0} for _ in thresholds]
    for (gt, det), (i_gt, dc, i_det) in zip(zip(groundtruth, detections), cleaned):
        for k, thresh in enumerate(thresholds):
            tmp = kitti_compute_statistics(cls, gt, det, dc, i_gt, i_det, True, thresh)
            for key in pr[k]:
                pr[k][key] += tmp[key]
    precision = [0.0] * KITTI_N_SAMPLE_PTS
    for i in range(len(thresholds)):
        precision[i] = pr[i]["tp"] / (pr[i]["tp"] + pr[i]["fp"])
    for i in range(len(thresholds)):
        precision[i] = max(precision[i:])
    return precision, n_gt


def kitti_ap(precision):
    """AP over 40 recall positions (slots 1..40, Simonelli et al., ICCV 2019) and over
    11 (slots 0, 4, ..., 40): the means the devkit's output is summarised by."""
    return sum(precision[1:]) / 40, sum(precision[0::4]) / 11
