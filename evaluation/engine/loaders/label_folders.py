"""KITTI, YOLO and Pascal VOC splits and detections: folders or zips of label files.

Detections may also be the VOC devkit's result files (``voc_det``, ``voc_results.py``:
one ``<comp>_det_<set>_<class>.txt`` per class, recognised by that name).

Each label file is one image, its id the file's name without extension
(``000012.txt`` -> image 12, read like a CSV image id: all-integer ids become
integers). The columns returned are the ones the CSV and COCO JSON readers return,
so ``load_truth`` validates, caches and hashes them the same way: the same split in
any format has one content hash.

Which files are labels: the ``.txt`` (KITTI, YOLO) or ``.xml`` (VOC) members, only
those inside a folder named ``labels``, ``label_2`` or ``annotations`` when there is
one (a whole KITTI ``training`` folder also holds ``calib/*.txt``); class-name files
are not labels. Images: the images table when given (``image_id,width,height,tags``;
then every label file must be listed), else every label file and every image file
(PNG, JPEG, BMP, GIF) by its name, with sizes from VOC's ``<size>`` or the image
file's header.
"""

import numpy as np

from ..boxes import from_corners
from ..errors import InputError
from . import csv_tables, kitti, voc_results, voc_xml, yolo
from .ids import INTEGER
from .image_sizes import IMAGE_EXTENSIONS, size_from_header
from .label_lines import lines
from .members import Members, extension, is_collection, stem

__all__ = ["FORMATS", "detect_path", "is_collection", "read_detections", "read_truth"]

FORMATS = ("kitti", "yolo", "voc", "voc_det")
LABEL_FOLDERS = {"labels", "label_2", "annotations"}
_FIELDS = {
    "kitti": {"image": "file name", "class": "type", "bbox": "x1..y2", "id": "line"},
    "yolo": {"image": "file name", "class": "class", "bbox": "cx cy w h", "id": "line"},
    "voc": {"image": "file name", "class": "name", "bbox": "bndbox", "id": "object"},
}


def _key(image_id):
    """Compare ids as numbers when they are integers (``000012`` is ``12``): ASCII
    digits only, as ``ids.csv_ids`` types them (``٣`` and ``³`` are text ids)."""
    text = str(image_id).strip()
    return int(text) if INTEGER.match(text) else text


def label_files(members, fmt):
    wanted = ".xml" if fmt == "voc" else ".txt"
    names = [n for n in members.names if extension(n) == wanted and not yolo.is_names_file(n)]
    inside = [n for n in names if LABEL_FOLDERS & {p.lower() for p in n.split("/")[:-1]}]
    names = inside or names
    seen = {}
    for name in names:
        earlier = seen.setdefault(_key(stem(name)), name)
        if earlier != name:
            raise InputError(
                members.path,
                f"two label files for one image ({earlier} and {name})",
                record=name,
            )
    return names


def result_files(members):
    """The VOC result files (``*_det_*_*.txt``) of a folder, in name order."""
    return sorted(n for n in members.names if voc_results.is_result_file(n))


def detect(path, members):
    """``kitti``, ``yolo``, ``voc`` or ``voc_det`` from the folder's content: VOC result
    files when every ``.txt`` file is named like one (``comp4_det_test_car.txt``)."""
    texts = [n for n in members.names if extension(n) == ".txt"]
    if texts and all(voc_results.is_result_file(n) for n in texts):
        return "voc_det"
    if any(extension(n) == ".xml" for n in members.names):
        return "voc"
    for name in label_files(members, "kitti"):
        for line, fields in lines(path, name, members.read(name)):
            if kitti.looks_like(fields):
                return "kitti"
            if yolo.looks_like(fields):
                return "yolo"
            raise InputError(
                path,
                f"{len(fields)} fields: neither a KITTI line ({kitti.LAYOUT}) nor a YOLO "
                f"line ({yolo.LAYOUT}); name the format if it is one of them",
                record=f"{name} line {line}",
            )
    if any(yolo.is_names_file(n) for n in members.names):
        return "yolo"
    raise InputError(
        path, "no label line in any .txt or .xml file: cannot tell the format; name it"
    )


def detect_path(path):
    with Members(path) as members:
        return detect(path, members)


def _image_files(members):
    found = {}
    for name in members.names:
        if extension(name) in IMAGE_EXTENSIONS:
            earlier = found.setdefault(_key(stem(name)), name)
            if earlier != name:
                raise InputError(
                    members.path, f"two image files for one image ({earlier})", record=name
                )
    return found


class _Images:
    """The split's images: ids (text), sizes, tags, and where each is described."""

    def __init__(self, path, members, label_names, images, sizes_from_labels):
        self.path = path
        if images is not None:
            ids, self.width, self.height, self.tags, table_lines = csv_tables.read_images(images)
            self.ids = list(ids)
            self.source = images
            self.locate = lambda i: f"line {table_lines[i]}"
            listed = {_key(i) for i in self.ids}
            for name in label_names:
                if _key(stem(name)) not in listed:
                    raise InputError(
                        path,
                        f"image {stem(name)!r} is not in the images table "
                        f"{getattr(images, 'name', images)}",
                        record=name,
                    )
        else:
            self._from_files(members, label_names, sizes_from_labels)
        self.index = {_key(image_id): i for i, image_id in enumerate(self.ids)}

    def _from_files(self, members, label_names, sizes_from_labels):
        image_files = _image_files(members)
        where = {_key(stem(n)): n for n in label_names}
        for key, name in image_files.items():
            where.setdefault(key, name)
        keys = sorted(where, key=lambda k: (isinstance(k, str), k))
        self.ids = [stem(where[k]) for k in keys]
        self.width = np.full(len(keys), np.nan)
        self.height = np.full(len(keys), np.nan)
        for i, key in enumerate(keys):
            size = sizes_from_labels.get(key)
            if (size is None or None in size) and key in image_files:
                size = size_from_header(members.head(image_files[key]))
            if size is not None and None not in size:
                self.width[i], self.height[i] = size
        self.tags = [()] * len(keys)
        self.source = self.path
        names = [where[k] for k in keys]
        self.locate = lambda i: names[i]

    def size_of(self, name):
        i = self.index[_key(stem(name))]
        return self.width[i], self.height[i]


def read_truth(path, images, fmt, classes):
    """Columns of a KITTI, YOLO or VOC split (``fmt`` None: detected from content)."""
    with Members(path) as members:
        fmt = fmt or detect(path, members)
        if fmt == "voc_det":
            raise InputError(
                path,
                "VOC detection result files (<comp>_det_<set>_<class>.txt) hold detections "
                "only; give the split as VOC XML, KITTI, YOLO, CSV or JSON",
            )
        names = label_files(members, fmt)
        if fmt == "voc":
            parsed = {n: voc_xml.parse(path, n, members.read(n)) for n in names}
            sizes = {_key(stem(n)): p[:2] for n, p in parsed.items()}
        else:
            parsed, sizes = {n: members.read(n) for n in names}, {}
        table = _Images(path, members, names, images, sizes)
        if fmt == "yolo":
            file_names = yolo.class_names(path, members)
            if file_names and classes and list(classes) != file_names:
                raise InputError(path, "the class names given differ from the folder's names file")
            class_names = file_names or (list(classes) if classes else None)
            if not class_names:
                raise InputError(
                    path, "a YOLO split needs its class names (classes.txt, *.names or data.yaml)"
                )
        else:
            class_names = list(classes) if classes else None
        rows, regions = _records(path, fmt, parsed, class_names, table)
    if class_names is None:
        class_names = sorted({r[2] for r in rows})
    return _columns(path, fmt, rows, regions, class_names, table)


def _records(path, fmt, parsed, class_names, table):
    """Per object: ``(file, line, class name, box, difficult, occlusion, truncation)``."""
    rows, regions = [], []
    for name, content in parsed.items():
        if fmt == "kitti":
            out = {"objects": [], "regions": []}
            kitti.parse_truth(path, name, content, out)
            rows += [(n, ln, t, b, False, o, tr) for n, ln, t, b, o, tr in out["objects"]]
            regions += out["regions"]
        elif fmt == "voc":
            for line, label, box, difficult, truncated, occluded in content[2]:
                rows.append(
                    (
                        name,
                        line,
                        label,
                        box,
                        bool(difficult),
                        np.nan if occluded is None else float(occluded),
                        np.nan if truncated is None else float(truncated),
                    )
                )
        else:
            out = []
            yolo.parse(path, name, content, len(class_names), False, out)
            if out:
                width, height = _known_size(path, name, table)
            for n, line, cls, box, _ in out:
                pixels = yolo.to_pixels(box, width, height)
                rows.append((n, line, class_names[cls], pixels, False, np.nan, np.nan))
    if class_names is not None:
        known = set(class_names)
        for name, line, label, *_ in rows:
            if label not in known:
                raise InputError(
                    path,
                    f"class {label!r} is not one of the split's classes",
                    record=f"{name} line {line}",
                    field=_FIELDS[fmt]["class"],
                )
    return rows, regions


def _known_size(path, name, table):
    width, height = table.size_of(name)
    if np.isnan(width) or np.isnan(height):
        raise InputError(
            path,
            "YOLO coordinates are normalised: this image needs its width and height "
            "(an images table, or the image file in the folder)",
            record=name,
        )
    return width, height


#: The label formats that give corners (``x1 y1 x2 y2``): their readers hand the
#: corners as read, kept beside the xywh boxes (``boxes.said_corners``).
CORNER_FORMATS = ("kitti", "voc", "voc_det")


def _boxes(fmt, values):
    """``(xywh boxes, corners as read or None)`` of a format's box lists."""
    values = np.array(values, np.float64).reshape(-1, 4)
    if fmt in CORNER_FORMATS:
        return from_corners(values), values
    return values, None


def _columns(path, fmt, rows, regions, class_names, table):
    index = {name: i + 1 for i, name in enumerate(class_names)}
    boxes, corners = _boxes(fmt, [r[3] for r in rows])
    region_boxes, region_corners = _boxes(fmt, [r[2] for r in regions])
    where = [f"{r[0]} line {r[1]}" for r in rows]
    region_where = [f"{r[0]} line {r[1]}" for r in regions]
    n = len(rows)
    return {
        "image_ids": table.ids,
        "image_width": table.width,
        "image_height": table.height,
        "image_tags": table.tags,
        "image_path": table.source,
        "locate_image": table.locate,
        "class_ids": np.arange(1, len(class_names) + 1, dtype=np.int64),
        "class_names": class_names,
        "box_ids": np.arange(1, n + 1, dtype=np.int64),
        "box_image_ids": [stem(r[0]) for r in rows],
        "box_class_ids": np.array([index[r[2]] for r in rows], np.int64),
        "boxes": boxes,
        "box_corners": corners,
        "box_area": np.full(n, np.nan),
        "crowd": np.zeros(n, bool),
        "difficult": np.array([r[4] for r in rows], bool),
        "ignore": np.zeros(n, bool),
        "occlusion": np.array([r[5] for r in rows], np.float64),
        "truncation": np.array([r[6] for r in rows], np.float64),
        "visibility": np.full(n, np.nan),
        "locate_box": lambda i: where[i],
        "box_fields": _FIELDS[fmt],
        "region_image_ids": [stem(r[0]) for r in regions],
        "regions": region_boxes,
        "region_corners": region_corners,
        "locate_region": lambda i: region_where[i],
        "format": fmt,
    }


def read_detections(path, fmt, truth, to_ids, *, drop_unknown_images=False):
    """Detections of a KITTI, YOLO or VOC-results folder: ``(image ids, class names,
    xywh boxes, scores, locate, dropped, corners as read or None, positions)``;
    ``to_ids`` types image ids like the split's. A record's position is its number in
    the order read here: files in name order (``Members.names``; VOC result files
    too), lines in file order, from 0.
    YOLO's normalised boxes need their image's size, so with ``drop_unknown_images``
    the records of images outside the split are dropped here (``dropped`` counts them,
    ``positions`` gives the kept records' positions; None when none was dropped);
    KITTI's and VOC results' are left to the caller."""
    with Members(path) as members:
        fmt = fmt or detect(path, members)
        if fmt == "voc":
            raise InputError(
                path,
                "VOC XML holds ground truth only; give detections as VOC result files "
                "(<comp>_det_<set>_<class>.txt), KITTI, YOLO, CSV or JSON",
            )
        if fmt == "voc_det":
            read = voc_results.read_detections(path, members, result_files(members), truth)
            return (*read, None)  # nothing dropped while reading
        names = label_files(members, fmt)
        records, dropped, positions = [], 0, None
        if fmt == "kitti":
            for name in names:
                kitti.parse_detections(path, name, members.read(name), records)
            labels = _case_insensitive(truth.classes, [r[2] for r in records])
            boxes = [r[3] for r in records]
        else:
            class_names = yolo.class_names(path, members) or list(truth.classes)
            for name in names:
                yolo.parse(path, name, members.read(name), len(class_names), True, records)
            if drop_unknown_images:
                known = _in_split(records, truth, to_ids)
                dropped = len(records) - int(known.sum())
                records = [r for r, keep in zip(records, known) if keep]
                positions = np.flatnonzero(known).astype(np.int64) if dropped else None
            labels = [class_names[r[2]] for r in records]
            boxes = _yolo_pixels(path, records, truth, to_ids)
    where = [f"{r[0]} line {r[1]}" for r in records]
    boxes, corners = _boxes(fmt, boxes)
    return (
        [stem(r[0]) for r in records],
        labels,
        boxes,
        np.array([r[4] for r in records], np.float64),
        lambda i: where[i],
        dropped,
        corners,
        positions,
    )


def _in_split(records, truth, to_ids):
    """Mask of the records whose image is one of the split's."""
    if not records:
        return np.zeros(0, bool)
    ids = np.asarray(to_ids([stem(r[0]) for r in records], truth.image_ids))
    return np.isin(ids, truth.image_ids)


def _case_insensitive(classes, labels):
    """KITTI types compare case-insensitively in the devkit (``strcasecmp``)."""
    lower = {}
    for name in classes:
        lower.setdefault(name.lower(), []).append(name)
    exact = set(classes)
    unique = {low: names[0] for low, names in lower.items() if len(names) == 1}
    return [label if label in exact else unique.get(label.lower(), label) for label in labels]


def _yolo_pixels(path, records, truth, to_ids):
    ids = to_ids([stem(r[0]) for r in records], truth.image_ids)
    order = np.argsort(truth.image_ids, kind="stable")
    pos = np.searchsorted(truth.image_ids[order], ids) if len(ids) else np.zeros(0, int)
    boxes = []
    for k, record in enumerate(records):
        p = min(pos[k], len(order) - 1)
        if truth.image_ids[order[p]] != ids[k]:
            raise InputError(
                path, f"image {stem(record[0])!r} is not in the split", record=record[0]
            )
        width, height = truth.image_width[order[p]], truth.image_height[order[p]]
        if np.isnan(width) or np.isnan(height):
            raise InputError(
                path,
                "YOLO coordinates are normalised: the split gives this image no width/height",
                record=f"{record[0]} line {record[1]}",
            )
        boxes.append(yolo.to_pixels(record[3], width, height))
    return boxes
