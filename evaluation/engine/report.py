"""Plain-text tables of a scorecard, for the command line."""


def _fmt(value, digits=4):
    if value is None:
        return "—"
    if isinstance(value, float):
        return f"{value:.{digits}f}"
    return str(value)


def _count(value):
    return "—" if value is None else f"{value:g}"


def table(result):
    """The summary, then one row per class."""
    counts = result.get("counts", {})
    lines = [
        f"protocol {result['protocol']} v{result['protocol_version']}  "
        f"engine {result['engine_version']}  "
        f"images {counts.get('images', '?')}  truth boxes {counts.get('truth_boxes', '?')}  "
        f"predictions {counts.get('predictions', '?')}",
        "",
        "summary",
    ]
    width = max(len(k) for k in result["summary"])
    for key, value in result["summary"].items():
        lines.append(f"  {key:<{width}}  {_fmt(value)}")
    coco = "AP50" in next(iter(result["per_class"].values()), {})
    columns = ["AP", "AP50", "AP75"] if coco else ["AP"]
    columns += ["recall"]
    name_width = max([len("class")] + [len(n) for n in result["per_class"]])
    header = f"  {'class':<{name_width}}" + "".join(f"  {c:>7}" for c in columns)
    header += f"  {'gt':>7}  {'tp':>7}  {'fp':>7}  {'bestF1':>7}  {'@score':>7}  {'LAMR':>7}"
    lines += ["", "per class", header]
    for name, row in result["per_class"].items():
        best = row.get("best_f1") or {}
        line = f"  {name:<{name_width}}" + "".join(f"  {_fmt(row.get(c)):>7}" for c in columns)
        line += (
            f"  {_count(row['gt']):>7}  {_count(row['tp']):>7}  {_count(row['fp']):>7}"
            f"  {_fmt(best.get('f1')):>7}  {_fmt(best.get('threshold'), 3):>7}"
            f"  {_fmt(row.get('miss_rate')):>7}"
        )
        lines.append(line)
    op = result.get("at_threshold")
    if op:
        lines += [
            "",
            f"at score >= {op['threshold']:g} (all classes): precision {_fmt(op['precision'])}  "
            f"recall {_fmt(op['recall'])}  F1 {_fmt(op['f1'])}",
        ]
    tags = result.get("slices", {}).get("tag", {})
    if tags:
        lines += ["", "by image tag"]
        for tag, entry in tags.items():
            lines.append(
                f"  {tag:<{name_width}}  AP {_fmt(entry['AP'])}  ({entry['images']} images)"
            )
    absent = "—"
    lines += ["", f"{absent} = absent: no ground truth for that class in the split"]
    return "\n".join(lines)
