"""The seeded split ``bench/sharded.py`` and ``bench/upload_check.py`` measure on: 100,000
images, ~750,000 boxes, 80 classes and 10,000,000 detections at ``scale`` 1 (``0.1``: a
tenth of each), written as COCO-style JSON a chunk of images at a time (``generate``)."""

import json

import numpy as np

IMAGES, BOXES_PER_IMAGE, CLASSES, DETECTIONS = 100_000, 7.5, 80, 10_000_000
CHUNK_IMAGES = 2000


def generate(directory, scale, seed=15):
    """Write truth.json and predictions.json a chunk of images at a time (the whole
    detection list is never in memory). Returns their paths."""
    directory.mkdir(parents=True, exist_ok=True)
    gt_path, dt_path = directory / "truth.json", directory / "predictions.json"
    if gt_path.exists() and dt_path.exists():
        return gt_path, dt_path
    n_images = int(IMAGES * scale)
    per_image = DETECTIONS / IMAGES
    rng = np.random.default_rng(seed)
    popularity = 1.0 / np.arange(1, CLASSES + 1) ** 0.8
    popularity /= popularity.sum()
    width, height = 1280, 720
    box_id = 1
    with open(gt_path, "w") as gt, open(dt_path, "w") as dt:
        gt.write('{"categories": ')
        gt.write(json.dumps([{"id": k + 1, "name": f"class_{k + 1:02d}"} for k in range(CLASSES)]))
        gt.write(', "images": [')
        gt.write(
            ",".join(
                f'{{"id":{i},"width":{width},"height":{height}}}' for i in range(1, n_images + 1)
            )
        )
        gt.write('], "annotations": [')
        dt.write("[")
        first_box = first_det = True
        for start in range(0, n_images, CHUNK_IMAGES):
            n = min(CHUNK_IMAGES, n_images - start)
            counts = rng.poisson(BOXES_PER_IMAGE, n)
            image = np.repeat(np.arange(start + 1, start + n + 1), counts)
            k = len(image)
            cls = rng.choice(CLASSES, k, p=popularity) + 1
            w = np.exp(rng.uniform(np.log(8), np.log(width / 3), k))
            h = np.exp(rng.uniform(np.log(8), np.log(height / 3), k))
            x, y = rng.uniform(0, width - w), rng.uniform(0, height - h)
            crowd = (rng.random(k) < 0.01).astype(int)
            rows = [
                f'{{"id":{box_id + i},"image_id":{image[i]},"category_id":{cls[i]},'
                f'"bbox":[{x[i]:.2f},{y[i]:.2f},{w[i]:.2f},{h[i]:.2f}],'
                f'"area":{w[i] * h[i]:.2f},"iscrowd":{crowd[i]}}}'
                for i in range(k)
            ]
            box_id += k
            if rows:
                gt.write(("" if first_box else ",") + ",".join(rows))
                first_box = False
            m = int(round(per_image * n))
            near = int(m * 0.45)
            src = rng.integers(0, max(k, 1), near)
            jitter = rng.choice([0.03, 0.08, 0.2], near)
            far = m - near
            d_image = np.r_[image[src], rng.integers(start + 1, start + n + 1, far)]
            wrong = rng.random(near) < 0.05
            d_cls = np.r_[
                np.where(wrong, rng.integers(1, CLASSES + 1, near), cls[src]),
                rng.choice(CLASSES, far, p=popularity) + 1,
            ]
            fw = np.exp(rng.uniform(np.log(8), np.log(width / 3), far))
            fh = np.exp(rng.uniform(np.log(8), np.log(height / 3), far))
            dw = np.r_[w[src] * np.exp(rng.normal(0, jitter)), fw]
            dh = np.r_[h[src] * np.exp(rng.normal(0, jitter)), fh]
            dx = np.r_[x[src] + rng.normal(0, jitter * w[src]), rng.uniform(0, width - fw)]
            dy = np.r_[y[src] + rng.normal(0, jitter * h[src]), rng.uniform(0, height - fh)]
            dx, dy = np.clip(dx, 0, width - 2), np.clip(dy, 0, height - 2)
            dw, dh = np.clip(dw, 1, width - dx), np.clip(dh, 1, height - dy)
            score = np.round(np.r_[rng.beta(5, 2, near), rng.beta(1.2, 5, far)], 3)  # ties
            order = rng.permutation(m)
            rows = [
                f'{{"image_id":{d_image[i]},"category_id":{d_cls[i]},'
                f'"bbox":[{dx[i]:.2f},{dy[i]:.2f},{dw[i]:.2f},{dh[i]:.2f}],"score":{score[i]}}}'
                for i in order
            ]
            if rows:
                dt.write(("" if first_det else ",\n") + ",\n".join(rows))
                first_det = False
        gt.write("]}")
        dt.write("]")
    return gt_path, dt_path
