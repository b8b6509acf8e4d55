"""The pedestrian miss-rate evaluations, transliterated line by line from the published
code's logic (not copied): the pedestrian detection toolbox of Dollár et al. (TPAMI
34(4), 2012) — ``bbGt.m`` ``evalRes``, ``compOas``, ``compRoc`` and ``dbEval.m``
``evalAlgs`` / ``plotExps`` — and the city-scale benchmark's Python evaluation (Zhang
et al., CVPR 2017) — ``eval_MR_multisetup.py`` ``Params``, ``_prepare``, ``computeIoU``
/ ``iou``, ``evaluateImg``, ``accumulate``, ``summarize`` with ``coco.py``'s ``loadRes``
(``cityscale_coco``, on the parsed JSON files). Slow, literal, independent of the engine.

A scene is a list of images; an image is ``(gt, dt)`` with ``gt`` rows ``(x, y, w, h,
visibility, ignore)`` (visibility None = not given; don't-care regions and neighbouring
labels are rows with ignore 1) and ``dt`` rows ``(x, y, w, h, score)`` in file order.
"""

import copy
import math
from collections import defaultdict

import numpy as np

from .oracle import matlab_descending_key

# dbEval exps {name, hr, vr, ar, overlap, filter} and the city-scale HtRng / VisRng
# (small only in the latter); inf as the toolbox writes it.
INF = math.inf
SETUPS = {
    "reasonable": ((50, INF), (0.65, INF)),
    "small": ((50, 75), (0.65, INF)),
    "heavy": ((50, INF), (0.2, 0.65)),
    "all": ((20, INF), (0.2, INF)),
}
FILTER = 1.25
REF = [10.0**e for e in (-2, -1.75, -1.5, -1.25, -1, -0.75, -0.5, -0.25, 0)]  # 10.^(-2:.25:0)
FPPI_THRS = [0.0100, 0.0178, 0.0316, 0.0562, 0.1000, 0.1778, 0.3162, 0.5623, 1.0000]


def matlab_min(a, b):
    """MATLAB's ``min(a, b)`` of two doubles: a NaN operand is omitted (MathWorks
    documentation: "min(A,B) ... omits NaN by default"); both NaN give NaN."""
    return b if math.isnan(a) else a if math.isnan(b) else min(a, b)


def matlab_max(a, b):
    """MATLAB's ``max(a, b)``: a NaN operand omitted, as ``matlab_min``."""
    return b if math.isnan(a) else a if math.isnan(b) else max(a, b)


def comp_oas(dt, gt, ig):
    """``bbGt compOas``: overlap of each dt with each gt; over the dt's area if ig."""
    m, n = len(dt), len(gt)
    oa = [[0.0] * n for _ in range(m)]
    for i in range(m):
        de = (dt[i][0] + dt[i][2], dt[i][1] + dt[i][3])
        da = dt[i][2] * dt[i][3]
        for j in range(n):
            ge = (gt[j][0] + gt[j][2], gt[j][1] + gt[j][3])
            ga = gt[j][2] * gt[j][3]
            w = matlab_min(de[0], ge[0]) - matlab_max(dt[i][0], gt[j][0])
            if w <= 0:
                continue
            h = matlab_min(de[1], ge[1]) - matlab_max(dt[i][1], gt[j][1])
            if h <= 0:
                continue
            t = w * h
            u = da if ig[j] else da + ga - t
            oa[i][j] = t / u
    return oa


def eval_res(gt0, dt0, thr=0.5):
    """``bbGt evalRes`` for one image: gt0 rows [x y w h ignore], dt0 rows
    [x y w h score]. Returns (gt, dt) with a match column: gt -1 ignore, 0 fn, 1 tp;
    dt -1 ignore, 0 fp, 1 tp."""
    dt0 = sorted(dt0, key=lambda r: matlab_descending_key(r[4]))  # stable, NaN first
    gt0 = sorted(gt0, key=lambda r: r[4])  # ignore last, stable
    gt = [list(r[:4]) + [-r[4]] for r in gt0]
    dt = [list(r[:5]) + [0] for r in dt0]
    oa = comp_oas([r[:4] for r in dt], [r[:4] for r in gt], [r[4] == -1 for r in gt])
    for d in range(len(dt)):
        bst_oa, bstg, bstm = thr, -1, 0
        for g in range(len(gt)):
            m = gt[g][4]
            if m == 1:
                continue
            if bstm != 0 and m == -1:
                break
            if oa[d][g] < bst_oa:
                continue
            bst_oa, bstg = oa[d][g], g
            bstm = 1 if m == 0 else -1
        if bstm == -1:
            dt[d][5] = -1
        elif bstm == 1:
            gt[bstg][4] = 1
            dt[d][5] = 1
    return gt, dt


def comp_roc(gt, dt, ref):
    """``bbGt compRoc`` (roc=1): recall at each reference FPPI over all images."""
    n_img = len(gt)
    gt = [r for image in gt for r in image if r[4] != -1]
    dt = [r for image in dt for r in image if r[5] != -1]
    if not dt:
        return [0.0] * len(ref)
    npos = len(gt)
    order = sorted(range(len(dt)), key=lambda i: matlab_descending_key(dt[i][4]))  # stable
    tp = np.cumsum([dt[i][5] for i in order])
    fp = np.cumsum([1 if dt[i][5] != 1 else 0 for i in order])
    xs1 = [-INF] + list(fp / n_img)
    ys1 = [0.0] + list(tp / npos)
    out = []
    for r in ref:
        j = [k for k in range(len(xs1)) if xs1[k] <= r]
        out.append(ys1[j[-1]])
    return out


def _ignored(row, setup):
    """The city-scale ``_prepare`` rule (closed ranges), a missing visibility read as
    fully visible; flagged rows stay ignored."""
    (h_lo, h_hi), (v_lo, v_hi) = SETUPS[setup]
    v = 1.0 if row[4] is None else row[4]
    return int(row[5] or row[3] < h_lo or row[3] > h_hi or v < v_lo or v > v_hi)


def _filter_gt_fun(row, setup):
    """``dbEval loadGt filterGtFun`` (ar = 0, no frame bounds): kept (not ignored) iff
    the label is the person label, ``h>=hr(1) & h<hr(2)``, and ``vf>=vr(1) &
    vf<=vr(2)`` with ``vf = inf`` for a box without a visible part."""
    (h_lo, h_hi), (v_lo, v_hi) = SETUPS[setup]
    vf = INF if row[4] is None else row[4]
    keep = not row[5] and h_lo <= row[3] < h_hi and v_lo <= vf <= v_hi
    return int(not keep)


def resize(bb, hr, wr, ar):
    """``bbApply resize`` for one bb with hr, wr > 0 or one of them 0."""
    x, y, w, h = bb
    if hr != 0:
        d = (hr - 1) * h
        y, h = y - d / 2, h + d
    if wr != 0:
        d = (wr - 1) * w
        x, w = x - d / 2, w + d
    if not hr:
        d = w / ar - h
        y, h = y - d / 2, h + d
    if not wr:
        d = h * ar - w
        x, w = x - d / 2, w + d
    return [x, y, w, h]


def _kept(row, setup):
    """``dbEval evalAlgs``: bb(:,4)>=hr(1)/filter & bb(:,4)<hr(2)*filter."""
    (h_lo, h_hi), _ = SETUPS[setup]
    return h_lo / FILTER <= row[3] < h_hi * FILTER


def toolbox(scene, setup, caltech=False):
    """(LAMR, miss rate at each reference) as ``dbEval`` computes them: evalRes per
    image, compRoc, ``exp(mean(log(max(1e-10, 1-ref))))``; None without positives.
    ``caltech``: ``loadGt``'s ``filterGtFun`` and ``resize(bb(ids,:),1,0,.41)`` of the
    kept boxes, ``loadDt``'s ``resize(bb,1,0,.41)`` of every detection."""
    if caltech:
        gt0 = []
        for gt, _ in scene:
            rows = [list(r[:4]) + [_filter_gt_fun(r, setup)] for r in gt]
            gt0.append([r if r[4] == 1 else resize(r[:4], 1, 0, 0.41) + [0] for r in rows])
        dt0 = [
            [resize(r[:4], 1, 0, 0.41) + [r[4]] for r in dt if _kept(r, setup)] for _, dt in scene
        ]
    else:
        gt0 = [[list(r[:4]) + [_ignored(r, setup)] for r in gt] for gt, _ in scene]
        dt0 = [[list(r) for r in dt if _kept(r, setup)] for _, dt in scene]
    if not any(r[4] == 0 for image in gt0 for r in image):
        return None, None
    pairs = [eval_res(g, d) for g, d in zip(gt0, dt0)]
    ref = comp_roc([p[0] for p in pairs], [p[1] for p in pairs], REF)
    miss = [1 - r for r in ref]
    return math.exp(np.mean([math.log(max(1e-10, m)) for m in miss])), miss


# The city-scale code ---------------------------------------------------------------
#
# ``eval_MR_multisetup.py`` (class ``COCOeval``: ``_prepare``, ``evaluate``,
# ``computeIoU``, ``iou``, ``evaluateImg``, ``accumulate``, ``summarize``; class
# ``Params``: ``setDetParams``) with the ``loadRes`` of the ``coco.py`` it ships, as
# ``eval_demo.py`` drives them (``imgIds = sorted(cocoGt.getImgIds())``, one
# ``evaluate(id_setup)`` / ``accumulate()`` / ``summarize(id_setup)`` per setup). The
# version read is the one whose ``_prepare`` deep-copies the annotations, so one setup's
# ignore flags do not carry into the next. Inputs are the files as parsed JSON: the
# ground truth a dict with ``images``, ``annotations`` (each with the script's keys
# ``height`` and ``vis_ratio``, optional ``ignore``), ``categories``; the results a list.
# Values pass into ``_prepare``'s comparisons as Python holds them, as in the script: a
# NaN ``vis_ratio`` is in no range's outside, a bool compares as 0/1, null or text raise
# TypeError; ``visibility`` and ``iscrowd`` are never read.

HT_RNG = [[50, 1e5**2], [50, 75], [50, 1e5**2], [20, 1e5**2]]  # Params.HtRng
VIS_RNG = [[0.65, 1e5**2], [0.65, 1e5**2], [0.2, 0.65], [0.2, 1e5**2]]  # Params.VisRng
SETUP_IDS = {"reasonable": 0, "small": 1, "heavy": 2, "all": 3}  # Params.SetupLbl order
MAX_DETS = [1000]  # Params.maxDets
EXP_FILTER = 1.25  # Params.expFilter
IOU_THRS = [0.5]  # Params.iouThrs


def _mergesort(values):
    """``np.argsort(values, kind='mergesort')`` of a Python list (stable; NaN last)."""
    return np.argsort(np.asarray(values, np.float64), kind="mergesort").tolist()


def load_res(dataset, results):
    """``coco.py`` ``COCO.loadRes`` for bbox results: each result gets ``area = w*h``,
    ``height = h`` (the box's own, whatever the file says), ``id`` = its 1-based position
    in the file and ``iscrowd = 0``. (It indexes ``anns[0]``: an empty list raises.)"""
    anns = copy.deepcopy(results)
    image_ids = {im["id"] for im in dataset["images"]}
    assert {a["image_id"] for a in anns} <= image_ids, "Results do not correspond"
    for i, ann in enumerate(anns):
        bb = ann["bbox"]
        # from memory: the shipped coco.py keeps pycocotools' corner lines (with a
        # float partner, an integer beyond float64's range raises OverflowError here)
        x1, x2, y1, y2 = [bb[0], bb[0] + bb[2], bb[1], bb[1] + bb[3]]
        if "segmentation" not in ann:
            ann["segmentation"] = [[x1, y1, x1, y2, x2, y2, x2, y1]]
        ann["area"] = bb[2] * bb[3]
        ann["height"] = bb[3]
        ann["id"] = i + 1
        ann["iscrowd"] = 0
    return anns


def _by_image_and_category(anns, img_ids, cat_ids):
    """``getAnnIds(imgIds, catIds)`` then ``loadAnns``: per image in ``img_ids`` order,
    its annotations in file order, of the listed categories; grouped as ``_prepare``
    groups them by ``(image_id, category_id)``."""
    by_image = defaultdict(list)
    for a in anns:
        by_image[a["image_id"]].append(a)
    out = defaultdict(list)
    for img in img_ids:
        for a in by_image.get(img, []):
            if a["category_id"] in cat_ids:
                out[a["image_id"], a["category_id"]].append(a)
    return out


def _iou(dts, gts, pyiscrowd):
    """``COCOeval.iou``: per (dt, gt), intersection over union, or over the dt's own
    area where the gt's ``int(ignore)`` is nonzero; 0 where they do not overlap. It
    starts (from memory) with ``np.asarray`` of its three lists: numpy scalars of a
    float64 or int64 array (a zero union gives NaN, int64 products wrap), or the Python
    values of an object array (a list holding an integer beyond int64: exact integer
    arithmetic; with a float, one beyond float64's range raises OverflowError)."""
    dts, gts, pyiscrowd = np.asarray(dts), np.asarray(gts), np.asarray(pyiscrowd)
    with np.errstate(all="ignore"):  # the script runs under numpy's defaults (warnings)
        return _iou_loop(dts, gts, pyiscrowd)


def _iou_loop(dts, gts, pyiscrowd):
    ious = np.zeros((len(dts), len(gts)))
    for j, gt in enumerate(gts):
        gx1, gy1 = gt[0], gt[1]
        gx2, gy2 = gt[0] + gt[2], gt[1] + gt[3]
        garea = gt[2] * gt[3]
        for i, dt in enumerate(dts):
            dx1, dy1 = dt[0], dt[1]
            dx2, dy2 = dt[0] + dt[2], dt[1] + dt[3]
            darea = dt[2] * dt[3]
            unionw = min(dx2, gx2) - max(dx1, gx1)
            if unionw <= 0:
                continue
            unionh = min(dy2, gy2) - max(dy1, gy1)
            if unionh <= 0:
                continue
            t = unionw * unionh
            unionarea = darea if pyiscrowd[j] else darea + garea - t
            ious[i, j] = float(t) / unionarea
    return ious


def _evaluate_img(gts, dts, h_rng, max_det):
    """``COCOeval.evaluateImg`` for one image and category (None when it has neither)."""
    gt, dt = gts, dts
    if len(gt) == 0 and len(dt) == 0:
        return None
    for g in gt:
        g["_ignore"] = 1 if g["ignore"] else 0
    gtind = _mergesort([g["_ignore"] for g in gt])  # ignore last, stable
    gt = [gt[i] for i in gtind]
    # numpy types the list from its values: integers stay exact (int64, uint64, object)
    dtind = np.argsort([-d["score"] for d in dt], kind="mergesort").tolist()
    dt = [dt[i] for i in dtind[0:max_det]]
    dt = [d for d in dt if h_rng[0] / EXP_FILTER <= d["height"] < h_rng[1] * EXP_FILTER]
    if len(dt) > 0:  # computeIoU: its own stable re-sort of dt changes no order
        ious = _iou(
            [d["bbox"] for d in dt], [g["bbox"] for g in gt], [int(g["ignore"]) for g in gt]
        )
    else:
        ious = []
    n_t, n_g, n_d = len(IOU_THRS), len(gt), len(dt)
    gtm = np.zeros((n_t, n_g))
    dtm = np.zeros((n_t, n_d))
    gt_ig = np.array([g["_ignore"] for g in gt])
    dt_ig = np.zeros((n_t, n_d))
    if not len(ious) == 0:
        for tind, t in enumerate(IOU_THRS):
            for dind, d in enumerate(dt):
                bst_oa = min([t, 1 - 1e-10])
                bstg = -2
                bstm = -2
                for gind, _g in enumerate(gt):
                    if gtm[tind, gind] > 0:
                        continue
                    if bstm != -2 and gt_ig[gind] == 1:
                        break
                    if ious[dind, gind] < bst_oa:
                        continue
                    bst_oa = ious[dind, gind]
                    bstg = gind
                    bstm = 1 if gt_ig[gind] == 0 else -1
                if bstg == -2:
                    continue
                dt_ig[tind, dind] = gt_ig[bstg]
                dtm[tind, dind] = gt[bstg]["id"]  # the box's id: id 0 reads as no match
                if bstm == 1:
                    gtm[tind, bstg] = d["id"]
    return {
        "dtScores": [d["score"] for d in dt],
        "dtMatches": dtm,
        "dtIgnore": dt_ig,
        "gtIgnore": gt_ig,
    }


def cityscale_coco(dataset, results, id_setup):
    """``(mean_s, miss rates)`` as ``evaluate(id_setup)``, ``accumulate()`` and
    ``summarize(id_setup)`` compute them: ``mean_s`` is -1 where ``accumulate`` filled
    nothing (no image with a box or detection of category 1, or no counted box of it),
    the miss rates then None."""
    dts_all = load_res(dataset, results)
    # eval_demo: imgIds = sorted(cocoGt.getImgIds()) (the image dict's keys, first
    # written); __init__: catIds = sorted(cocoGt.getCatIds()) (the categories as listed,
    # repeats and all); evaluate: p.imgIds = list(np.unique(p.imgIds)), p.catIds alike.
    # Lookups below are by those numpy values, as in the script's dicts.
    img_ids = list(np.unique(sorted(dict.fromkeys(im["id"] for im in dataset["images"]))))
    cat_ids = list(np.unique(sorted(c["id"] for c in dataset["categories"])))
    # _prepare: deep copies of getAnnIds(imgIds, catIds) (image by image in sorted id
    # order, file order within; listed images and categories only), then the ignore
    # flag. (Before engine 2.15.8 this took every annotation in file order: the same
    # numbers, but it raised on a null vis_ratio of an unlisted image, as the script
    # does not.) getAnnIds keeps an annotation when ``ann['category_id'] in catIds``, a
    # list test by ``==``: a numeric id numpy rounded still equals its rounded value.
    # loadAnns(ids) is ``[self.anns[id] for id in ids]``, ``anns`` filled in file order
    # by createIndex (pycocotools 2.0.11's coco.py, the script's COCO): a repeated id
    # gives the last annotation with it, once per fetched occurrence.
    by_image, anns = {}, {}
    for ann in dataset["annotations"]:
        by_image.setdefault(ann["image_id"], []).append(ann)
        anns[ann["id"]] = ann
    gts_all = copy.deepcopy(
        [anns[a["id"]] for i in img_ids for a in by_image.get(i, []) if a["category_id"] in cat_ids]
    )
    for gt in gts_all:
        gt["ignore"] = gt["ignore"] if "ignore" in gt else 0
        out_of_range = (
            gt["height"] < HT_RNG[id_setup][0]
            or gt["height"] > HT_RNG[id_setup][1]
            or gt["vis_ratio"] < VIS_RNG[id_setup][0]
            or gt["vis_ratio"] > VIS_RNG[id_setup][1]
        )
        gt["ignore"] = 1 if out_of_range else gt["ignore"]
    gts = _by_image_and_category(gts_all, img_ids, cat_ids)
    dts = _by_image_and_category(dts_all, img_ids, cat_ids)
    max_det = MAX_DETS[-1]
    eval_imgs = [
        _evaluate_img(gts[img, cat], dts[img, cat], HT_RNG[id_setup], max_det)
        for cat in cat_ids
        for img in img_ids
    ]
    # accumulate: catIds = [1] hard-coded; k_list are positions of id 1 in catIds
    n_i = len(img_ids)
    ys = -np.ones(len(FPPI_THRS))
    for k0 in [n for n, k in enumerate(cat_ids) if k in {1}]:
        e_list = [eval_imgs[k0 * n_i + i] for i in range(n_i)]
        e_list = [e for e in e_list if e is not None]
        if len(e_list) == 0:
            continue
        dt_scores = np.concatenate([e["dtScores"][0:max_det] for e in e_list])
        inds = np.argsort(-dt_scores, kind="mergesort")
        dtm = np.concatenate([e["dtMatches"][:, 0:max_det] for e in e_list], axis=1)[:, inds]
        dt_ig = np.concatenate([e["dtIgnore"][:, 0:max_det] for e in e_list], axis=1)[:, inds]
        gt_ig = np.concatenate([e["gtIgnore"] for e in e_list])
        npig = np.count_nonzero(gt_ig == 0)
        if npig == 0:
            continue
        tps = np.logical_and(dtm, np.logical_not(dt_ig))
        fps = np.logical_and(np.logical_not(dtm), np.logical_not(dt_ig))
        for t, (tp, fp) in enumerate(zip(tps, fps)):
            keep = np.where(dt_ig[t] == 0)[0]
            tp = np.cumsum(tp[keep]).astype(np.float64)
            fp = np.cumsum(fp[keep]).astype(np.float64)
            fppi = np.array(fp) / n_i
            nd = len(tp)
            recall = (tp / npig).tolist()
            q = [0.0] * len(FPPI_THRS)
            for i in range(nd - 1, 0, -1):
                if recall[i] < recall[i - 1]:
                    recall[i - 1] = recall[i]
            pis = np.searchsorted(fppi, FPPI_THRS, side="right") - 1
            try:
                for ri, pi in enumerate(pis):
                    q[ri] = recall[pi]  # pi = -1: the last recall
            except IndexError:  # no detection left: q stays 0 from here on
                pass
            ys = np.array(q)
    # summarize(iouThr=.5, maxDets=1000)
    mrs = 1 - ys
    if len(mrs[mrs < 2]) == 0:
        return -1, None
    with np.errstate(divide="ignore"):
        mean_s = np.exp(np.mean(np.log(mrs[mrs < 2])))
    return float(mean_s), mrs.tolist()


def cityscale_script(dataset, results):
    """``eval_demo.py``: ``evaluate(id_setup)``, ``accumulate()``, ``summarize`` for the
    setups 0..3 in turn, each on its own deep copy; ``[(mean_s, miss rates)]`` per
    setup, or the exception of the first setup that raises (``_prepare``'s TypeError
    comparing a ``vis_ratio``, ``computeIoU``'s ``int(ignore)``: the script stops there
    and prints nothing more)."""
    return [cityscale_coco(dataset, results, id_setup) for id_setup in range(4)]


def scene_dataset(scene):
    """A scene as the city-scale code's input files: one category (id 1), annotation
    ids from 1, ``height`` the box's h, ``vis_ratio`` the visibility (1.0 when not
    given), ``ignore`` the row's flag; results in file order, image by image."""
    images = [{"id": i + 1} for i in range(len(scene))]
    annotations, results = [], []
    for i, (gt, dt) in enumerate(scene, start=1):
        for r in gt:
            annotations.append(
                {
                    "id": len(annotations) + 1,
                    "image_id": i,
                    "category_id": 1,
                    "bbox": list(r[:4]),
                    "height": r[3],
                    "vis_ratio": 1.0 if r[4] is None else r[4],
                    "ignore": r[5],
                }
            )
        results += [
            {"image_id": i, "category_id": 1, "bbox": list(d[:4]), "score": d[4]} for d in dt
        ]
    return {"images": images, "annotations": annotations, "categories": [{"id": 1}]}, results


def cityscale(scene, setup):
    """(LAMR, miss rate at each reference) of a scene as the city-scale code computes
    them (``cityscale_coco`` on ``scene_dataset``); (None, None) where it reports -1."""
    mean_s, mrs = cityscale_coco(*scene_dataset(scene), SETUP_IDS[setup])
    return (None, None) if mrs is None else (mean_s, mrs)
