"""The pedestrian miss-rate evaluations, transliterated line by line from the published
code's logic (not copied): the pedestrian detection toolbox of Dollár et al. (TPAMI
34(4), 2012) — ``bbGt.m`` ``evalRes``, ``compOas``, ``compRoc`` and ``dbEval.m``
``evalAlgs`` / ``plotExps`` — and the city-scale benchmark's Python evaluation (Zhang
et al., CVPR 2017) — ``eval_MR_multisetup.py`` ``_prepare``, ``evaluateImg``,
``accumulate``, ``summarize``. Slow, literal, independent of the engine.

A scene is a list of images; an image is ``(gt, dt)`` with ``gt`` rows ``(x, y, w, h,
visibility, ignore)`` (visibility None = not given; don't-care regions and neighbouring
labels are rows with ignore 1) and ``dt`` rows ``(x, y, w, h, score)`` in file order.
"""

import math

import numpy as np

from .oracle import matlab_descending_key


def numpy_descending_key(value):
    """Sort key of ``np.argsort(-scores, kind='mergesort')`` (the city-scale code): NaN
    last (numpy sorts NaN to the end), larger values first, stable."""
    return (1, 0.0) if np.isnan(value) else (0, -value)


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
            w = min(de[0], ge[0]) - max(dt[i][0], gt[j][0])
            if w <= 0:
                continue
            h = min(de[1], ge[1]) - max(dt[i][1], gt[j][1])
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


def cityscale(scene, setup, max_det=1000):
    """(LAMR, miss rate at each reference) as the city-scale ``evaluateImg`` /
    ``accumulate`` / ``summarize`` compute them (one IoU threshold, 0.5)."""
    (h_lo, h_hi), _ = SETUPS[setup]
    images = []
    for gt, dt in scene:
        g_rows = [(list(r[:4]), _ignored(r, setup)) for r in gt]
        gtind = sorted(range(len(g_rows)), key=lambda i: g_rows[i][1])  # mergesort
        g_rows = [g_rows[i] for i in gtind]
        dtind = sorted(range(len(dt)), key=lambda i: numpy_descending_key(dt[i][4]))[:max_det]
        d_rows = [dt[i] for i in dtind]
        d_rows = [d for d in d_rows if h_lo / FILTER <= d[3] < h_hi * FILTER]
        ious = comp_oas([d[:4] for d in d_rows], [g[0] for g in g_rows], [g[1] for g in g_rows])
        gtm = [0] * len(g_rows)
        dtm = [0] * len(d_rows)
        dt_ig = [0] * len(d_rows)
        for dind in range(len(d_rows)):
            bst_oa, bstg, bstm = min(0.5, 1 - 1e-10), -2, -2
            for gind in range(len(g_rows)):
                if gtm[gind] > 0:
                    continue
                if bstm != -2 and g_rows[gind][1] == 1:
                    break
                if ious[dind][gind] < bst_oa:
                    continue
                bst_oa, bstg = ious[dind][gind], gind
                bstm = 1 if g_rows[gind][1] == 0 else -1
            if bstg == -2:
                continue
            dt_ig[dind] = g_rows[bstg][1]
            dtm[dind] = 1
            if bstm == 1:
                gtm[bstg] = 1
        images.append(([d[4] for d in d_rows], dtm, dt_ig, [g[1] for g in g_rows]))
    scores = [s for e in images for s in e[0]]
    inds = sorted(range(len(scores)), key=lambda i: numpy_descending_key(scores[i]))  # mergesort
    dtm = np.concatenate([e[1] for e in images] + [[]])[inds].tolist() if inds else []
    dt_ig = np.concatenate([e[2] for e in images] + [[]])[inds].tolist() if inds else []
    npig = sum(1 for e in images for g in e[3] if g == 0)
    if npig == 0:
        return None, None
    keep = [i for i in range(len(dtm)) if dt_ig[i] == 0]
    tps = np.cumsum([1 if dtm[i] else 0 for i in keep]).astype(float)
    fps = np.cumsum([0 if dtm[i] else 1 for i in keep]).astype(float)
    fppi = fps / len(scene)
    recall = (tps / npig).tolist()
    q = [0.0] * len(FPPI_THRS)
    inds = np.searchsorted(fppi, FPPI_THRS, side="right") - 1
    try:
        for ri, pi in enumerate(inds):
            q[ri] = recall[pi]
    except IndexError:
        pass
    mrs = [1 - v for v in q]
    with np.errstate(divide="ignore"):
        return float(np.exp(np.mean(np.log(mrs)))), mrs
