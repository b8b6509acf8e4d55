"""Command line: ``python -m evaluation.engine score --truth GT --predictions PRED``,
``python -m evaluation.engine explain A.json B.json``.

Exit status: 0 on success, 2 on bad input (the message names file, record, field).
"""

import argparse
import json
import math
import os
import sys

from . import export, provenance
from .difficulty import DIFFICULTY_PRESETS, evaluate_levels, levels_table
from .errors import InputError
from .evaluate import evaluate
from .level_provenance import annotate_levels
from .loaders import BOX_POLICIES, FORMATS, load_predictions, load_truth
from .pedestrian import MISS_RATE_PRESETS, evaluate_setups, setups_table
from .protocols import PRESETS, get_protocol, protocol_from_dict
from .report import table

EXIT_BAD_INPUT = 2


def _protocol(value):
    if value in PRESETS:
        return get_protocol(value)
    try:
        with open(value, encoding="utf-8") as f:
            spec = json.load(f)
    except OSError as e:
        raise InputError(
            value, f"not a preset ({', '.join(PRESETS)}) and not readable: {e.strerror}"
        ) from None
    except json.JSONDecodeError as e:
        raise InputError(
            value, f"not valid JSON: {e.msg} at line {e.lineno}, column {e.colno}"
        ) from None
    return protocol_from_dict(spec, source=value)


def _finite(text):
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a number: {text!r}") from None
    if not math.isfinite(value):
        raise argparse.ArgumentTypeError(f"must be a finite number, got {text!r}")
    return value


def _export_path(text):
    try:
        export.format_of(text)
    except ValueError as e:
        raise argparse.ArgumentTypeError(str(e)) from None
    return text


def build_parser():
    parser = argparse.ArgumentParser(
        prog="python -m evaluation.engine", description=__doc__.split("\n")[0]
    )
    commands = parser.add_subparsers(dest="command", required=True)
    score = commands.add_parser("score", help="score predictions against a benchmark split")
    score.add_argument(
        "--truth",
        required=True,
        help="COCO-style JSON, a boxes CSV, or a folder or zip of KITTI, YOLO or VOC XML labels",
    )
    score.add_argument(
        "--images",
        help="images table CSV (image_id; width,height,tags optional): needed for a CSV split, "
        "optional for label folders (else sizes from the image files)",
    )
    score.add_argument(
        "--predictions",
        required=True,
        help="COCO-style results JSON, CSV, or a folder or zip of KITTI or YOLO labels",
    )
    score.add_argument(
        "--truth-format", choices=FORMATS, help="the split's format (default: from content)"
    )
    score.add_argument(
        "--predictions-format", choices=FORMATS, help="the detections' format (default: detected)"
    )
    score.add_argument(
        "--protocol",
        default="coco",
        help=f"preset ({', '.join([*PRESETS, *DIFFICULTY_PRESETS, *MISS_RATE_PRESETS])}) or a "
        "JSON file with a custom preset",
    )
    score.add_argument("--format", choices=("table", "json"), default="table")
    score.add_argument(
        "--threshold", type=_finite, default=0.5, help="score cut for the operating point"
    )
    score.add_argument(
        "--boxes",
        choices=BOX_POLICIES,
        default="keep",
        help="boxes that leave the image: keep as given (default, as the reference "
        "implementations), clip predictions to the frame, or reject the file",
    )
    score.add_argument(
        "--unknown-classes",
        choices=("drop", "reject"),
        default="drop",
        help="detections of classes the split does not list: drop and count them "
        "(default, as pycocotools) or reject the file",
    )
    score.add_argument(
        "--annotations",
        choices=("reference", "strict"),
        default="reference",
        help="COCO JSON ground truth: score the annotations pycocotools scores (default: "
        "a repeated id resolves to its last annotation, annotations of unlisted images or "
        "categories are left out, all counted) or refuse such files",
    )
    score.add_argument("--cache", metavar="DIR", help="keep parsed input as .npz here")
    score.add_argument("--records", metavar="FILE.npz", help="also write the match records")
    score.add_argument(
        "--records-out",
        metavar="FILE.csv|FILE.jsonl",
        type=_export_path,
        help="also write every detection and box with its outcome and reason, "
        "as CSV or JSON Lines (by the extension)",
    )
    explain = commands.add_parser(
        "explain", help="which protocol settings differ between two JSON results, in words"
    )
    explain.add_argument("a", metavar="A.json")
    explain.add_argument("b", metavar="B.json")
    return parser


def main(argv=None):
    args = build_parser().parse_args(argv)
    if args.command == "explain":
        try:
            print(provenance.explain(args.a, args.b))
        except InputError as e:
            print(f"error: {e}", file=sys.stderr)
            return EXIT_BAD_INPUT
        return 0
    try:
        setups = args.protocol in MISS_RATE_PRESETS
        levels = args.protocol in DIFFICULTY_PRESETS or setups
        if levels and (args.records or args.records_out):
            raise InputError(
                "--protocol", f"{args.protocol} keeps no match records (--records, --records-out)"
            )
        protocol = args.protocol if levels else _protocol(args.protocol)
        truth = load_truth(
            args.truth,
            images=args.images,
            fmt=args.truth_format,
            cache_dir=args.cache,
            boxes=args.boxes,
            annotations=args.annotations,
        )
        predictions = load_predictions(
            args.predictions,
            truth,
            fmt=args.predictions_format,
            boxes=args.boxes,
            unknown_classes=args.unknown_classes,
            cache_dir=args.cache,
        )
        if setups:
            result, records = evaluate_setups(truth, predictions, protocol), None
            annotate_levels(result, protocol, truth, predictions)
        elif levels:
            result, records = evaluate_levels(truth, predictions, protocol), None
            annotate_levels(result, protocol, truth, predictions)
        else:
            result, records = evaluate(
                truth, predictions, protocol, score_threshold=args.threshold, return_records=True
            )
    except InputError as e:
        print(f"error: {e}", file=sys.stderr)
        return EXIT_BAD_INPUT
    if args.records and records is not None:
        records.save(args.records)
    if args.records_out:
        export.write(args.records_out, records, truth)
    if args.format == "json":
        json.dump(result, sys.stdout, indent=2, allow_nan=False)  # strict JSON only
        sys.stdout.write("\n")
    else:
        if setups:
            print(setups_table(result))
        else:
            print(levels_table(result) if levels else table(result))
    return 0


def _run():
    """``main``, quiet when the reader of its output goes away (``... | head``): Python's
    documented way (the ``signal`` module's notes on SIGPIPE) is to point stdout at
    devnull so the interpreter's final flush does not raise again."""
    try:
        code = main()
        sys.stdout.flush()
    except BrokenPipeError:
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        code = 1
    return code


if __name__ == "__main__":
    sys.exit(_run())
