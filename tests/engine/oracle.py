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


def greedy_ap(truth, predictions, *, thresholds, recall_points, max_detections, epsilon):
    """AP per (slot, class) under the pycocotools rules, area 'all'. NaN = absent."""
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
            ignore = {j: bool(truth.crowd[j] or truth.ignore[j] or truth.difficult[j]) for j in gts}
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
                    per_slot[t].append(
                        (
                            -predictions.score[d],
                            image,
                            order,
                            m is not None and not ignore[m],
                            m is not None and ignore[m],
                        )
                    )
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


def voc_ap(truth, predictions, *, eleven_point, min_overlap=0.5):
    """AP per class by VOCevaldet.m: single best box, inclusive pixels, difficult.

    The devkit knows no crowd regions; like the engine, treat them (and boxes flagged
    ``ignore``) as difficult.
    """
    out = np.full(len(truth.classes), np.nan)
    difficult = truth.difficult | truth.crowd | truth.ignore
    for k in range(len(truth.classes)):
        boxes = [j for j in range(truth.n_boxes) if truth.box_class[j] == k]
        n_pos = sum(not difficult[j] for j in boxes)
        if n_pos == 0:
            continue
        dets = [i for i in range(len(predictions)) if predictions.cls[i] == k]
        # The devkit sorts the whole list by score; ties: image order, then file order
        # (our documented tie rule; the devkit keeps file order).
        dets.sort(key=lambda i: (-predictions.score[i], predictions.image[i]))
        taken = set()
        tp, fp = [], []
        for i in dets:
            candidates = [j for j in boxes if truth.box_image[j] == predictions.image[i]]
            ov_max, j_max = -np.inf, None
            for j in candidates:
                ov = _iou(predictions.boxes[i], truth.boxes[j], False, 1.0)
                if ov > 0 and ov > ov_max:  # MATLAB max: first maximum
                    ov_max, j_max = ov, j
            if ov_max >= min_overlap:
                if difficult[j_max]:
                    tp.append(0), fp.append(0)
                elif j_max not in taken:
                    taken.add(j_max)
                    tp.append(1), fp.append(0)
                else:
                    tp.append(0), fp.append(1)
            else:
                tp.append(0), fp.append(1)
        tp, fp = np.cumsum(tp), np.cumsum(fp)
        rec = tp / n_pos
        with np.errstate(invalid="ignore", divide="ignore"):
            prec = np.nan_to_num(tp / (fp + tp), nan=0.0)
        if eleven_point:
            ap = 0.0
            for t in [k10 / 10 for k10 in range(11)]:
                sel = prec[rec >= t]
                ap += (sel.max() if len(sel) else 0.0) / 11
        else:
            mrec = np.r_[0.0, rec, 1.0]
            mpre = np.r_[0.0, prec, 0.0]
            for i in range(len(mpre) - 2, -1, -1):
                mpre[i] = max(mpre[i], mpre[i + 1])
            idx = np.flatnonzero(mrec[1:] != mrec[:-1]) + 1
            ap = float(np.sum((mrec[idx] - mrec[idx - 1]) * mpre[idx]))
        out[k] = ap
    return out
