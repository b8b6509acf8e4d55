"""Write one split (and one detection set) in every format the engine reads.

A split here is plain Python: images ``{id: (width, height)}``, classes in order,
boxes ``(image_id, class, [x, y, w, h], attributes)`` with attributes a dict of
``occlusion`` / ``truncation`` / ``visibility`` / ``difficult`` (any may be absent)
and don't-care regions ``(image_id, [x, y, w, h])``. Layouts: the KITTI object
devkit's readme (15 fields, a 16th score for detections), the YOLO label layout
(``class cx cy w h [score]``, normalised), the VOC devkit's annotation XML.
"""

import json
import zipfile
from pathlib import Path


def _fmt(value):
    return repr(float(value))


def coco(path, images, classes, boxes, regions=(), detections=None):
    """COCO-style JSON truth (or, with ``detections``, the results array)."""
    if detections is not None:
        data = [
            {"image_id": i, "category_id": classes.index(c) + 1, "bbox": list(b), "score": s}
            for i, c, b, s in detections
        ]
    else:
        data = {
            "images": [{"id": i, "width": w, "height": h} for i, (w, h) in images.items()],
            "annotations": [
                {
                    "id": k + 1,
                    "image_id": i,
                    "category_id": classes.index(c) + 1,
                    "bbox": list(b),
                    **{key: value for key, value in attrs.items()},
                }
                for k, (i, c, b, attrs) in enumerate(boxes)
            ],
            "categories": [{"id": k + 1, "name": c} for k, c in enumerate(classes)],
        }
        if regions:
            data["dont_care"] = [{"image_id": i, "bbox": list(b)} for i, b in regions]
    Path(path).write_text(json.dumps(data))
    return path


def csv(folder, images, classes, boxes, regions=(), detections=None):
    """A boxes CSV and its images table (or a detections CSV)."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    if detections is not None:
        rows = ["image_id,label,x_min,y_min,x_max,y_max,score"]
        rows += [
            f"{i},{c},{_fmt(b[0])},{_fmt(b[1])},{_fmt(b[0] + b[2])},{_fmt(b[1] + b[3])},{s!r}"
            for i, c, b, s in detections
        ]
        (folder / "detections.csv").write_text("\n".join(rows) + "\n")
        return folder / "detections.csv"
    table = ["image_id,width,height"] + [f"{i},{w},{h}" for i, (w, h) in images.items()]
    (folder / "images.csv").write_text("\n".join(table) + "\n")
    names = ("occlusion", "truncation", "visibility", "difficult")
    rows = ["image_id,label,x_min,y_min,x_max,y_max," + ",".join(names) + ",dont_care"]
    for i, c, b, attrs in boxes:
        extra = [_flag_or(attrs.get(n), n == "difficult") for n in names]
        corners = [b[0], b[1], b[0] + b[2], b[1] + b[3]]
        rows.append(f"{i},{c}," + ",".join(_fmt(v) for v in corners) + "," + ",".join(extra) + ",0")
    for i, b in regions:
        corners = [b[0], b[1], b[0] + b[2], b[1] + b[3]]
        rows.append(f"{i},," + ",".join(_fmt(v) for v in corners) + ",,,,,1")
    (folder / "boxes.csv").write_text("\n".join(rows) + "\n")
    return folder / "boxes.csv", folder / "images.csv"


def _flag_or(value, is_flag):
    if value is None:
        return ""
    return str(int(value)) if is_flag else repr(value)


def kitti(folder, images, classes, boxes, regions=(), detections=None, zip_to=None):
    """One ``NNNNNN.txt`` per image; with ``zip_to`` the folder zipped as well."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    lines = {i: [] for i in images}
    if detections is not None:
        for i, c, b, s in detections:
            lines[i].append(f"{c} -1 -1 -10 {_corners(b)} -1 -1 -1 -1000 -1000 -1000 -10 {s!r}")
    else:
        for i, c, b, attrs in boxes:
            trunc = attrs.get("truncation", -1.0)  # -1: not given
            occ = attrs.get("occlusion", -1)
            lines[i].append(f"{c} {trunc!r} {int(occ)} -10 {_corners(b)} 1.5 1.6 3.9 1 2 30 0.1")
        for i, b in regions:
            lines[i].append(f"DontCare -1 -1 -10 {_corners(b)} -1 -1 -1 -1000 -1000 -1000 -10")
    for i, rows in lines.items():
        (folder / f"{i:06d}.txt").write_text("".join(r + "\n" for r in rows))
    return _zip(folder, zip_to) if zip_to else folder


def _corners(b):
    return " ".join(_fmt(v) for v in (b[0], b[1], b[0] + b[2], b[1] + b[3]))


def yolo(folder, images, classes, boxes, detections=None, names_file=True):
    """``<id>.txt`` per image under ``labels/``, normalised; ``classes.txt``."""
    folder = Path(folder)
    (folder / "labels").mkdir(parents=True, exist_ok=True)
    if names_file:
        (folder / "classes.txt").write_text("\n".join(classes) + "\n")
    lines = {i: [] for i in images}
    items = detections if detections is not None else [(i, c, b, None) for i, c, b, _ in boxes]
    for i, c, b, s in items:
        w, h = images[i]
        norm = [(b[0] + b[2] / 2) / w, (b[1] + b[3] / 2) / h, b[2] / w, b[3] / h]
        row = f"{classes.index(c)} " + " ".join(repr(v) for v in norm)
        lines[i].append(row + (f" {s!r}" if s is not None else ""))
    for i, rows in lines.items():
        (folder / "labels" / f"{i}.txt").write_text("".join(r + "\n" for r in rows))
    return folder


def voc(folder, images, classes, boxes):
    """``Annotations/<id>.xml`` per image, VOC devkit layout."""
    folder = Path(folder)
    (folder / "Annotations").mkdir(parents=True, exist_ok=True)
    for image_id, (w, h) in images.items():
        objects = []
        for i, c, b, attrs in boxes:
            if i != image_id:
                continue
            flags = ""
            if "difficult" in attrs:
                flags += f"<difficult>{int(attrs['difficult'])}</difficult>"
            if "truncation" in attrs:
                flags += f"<truncated>{int(attrs['truncation'] > 0)}</truncated>"
            if "occlusion" in attrs:
                flags += f"<occluded>{int(attrs['occlusion'] > 0)}</occluded>"
            objects.append(
                f"<object><name>{c}</name><pose>Unspecified</pose>{flags}<bndbox>"
                f"<xmin>{_fmt(b[0])}</xmin><ymin>{_fmt(b[1])}</ymin>"
                f"<xmax>{_fmt(b[0] + b[2])}</xmax><ymax>{_fmt(b[1] + b[3])}</ymax>"
                "</bndbox></object>"
            )
        xml = (
            f"<annotation><folder>road</folder><filename>{image_id}.png</filename>"
            f"<size><width>{w}</width><height>{h}</height><depth>3</depth></size>"
            + "".join(objects)
            + "</annotation>\n"
        )
        (folder / "Annotations" / f"{image_id}.xml").write_text(xml)
    return folder


def _zip(folder, target):
    with zipfile.ZipFile(target, "w", zipfile.ZIP_DEFLATED) as z:
        for path in sorted(Path(folder).rglob("*")):
            if path.is_file():
                z.write(path, path.relative_to(folder).as_posix())
    return Path(target)
