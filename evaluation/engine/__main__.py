"""Command line: ``python -m evaluation.engine score --truth GT --predictions PRED``,
``python -m evaluation.engine explain A.json B.json``.

Exit status: 0 on success, 2 on bad input (the message names file, record, field).
"""

import argparse
import json
import math
import os
import re
import sys

from . import cli_files, explain, export, json_file
from .difficulty import DIFFICULTY_PRESETS, evaluate_levels, levels_table
from .errors import InputError
from .evaluate import evaluate
from .level_provenance import annotate_levels
from .loaders import (
    BOX_POLICIES,
    FORMATS,
    VIS_RATIO_READINGS,
    detect_format,
    load_predictions,
    load_truth,
)
from .pedestrian import MISS_RATE_PRESETS, evaluate_setups, setups_table
from .protocols import PRESETS, get_protocol, protocol_from_dict
from .report import table
from .version import ENGINE_VERSION

EXIT_BAD_INPUT = 2
#: Every preset ``--protocol`` names; the level ones keep no match records.
ALL_PRESETS = (*PRESETS, *DIFFICULTY_PRESETS, *MISS_RATE_PRESETS)
#: ``--threshold`` when not given: the operating point's score cut.
DEFAULT_THRESHOLD = 0.5


def _protocol(value):
    if value in PRESETS:
        return get_protocol(value)
    unreadable = f"not a preset ({', '.join(ALL_PRESETS)}) and not readable"
    spec = json_file.read(value, cannot_open=unreadable)
    return protocol_from_dict(spec, source=value)


#: A decimal number in ASCII digits (Python's ``float`` also reads ``1_0``, other
#: scripts' digits and ``nan``/``inf``, which a score cut given on the command line
#: should not silently become).
DECIMAL = re.compile(r"[+-]?(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?")


def _finite(text):
    if not DECIMAL.fullmatch(text):
        raise argparse.ArgumentTypeError(
            f"must be a finite decimal number in ASCII digits (0.5, 1e-3), got {text!r}"
        )
    value = float(text)
    if not math.isfinite(value):
        raise argparse.ArgumentTypeError(f"must be a finite number, got {text!r}")
    if value == 0 and re.search(r"[1-9]", text.split("e")[0].split("E")[0]):
        raise argparse.ArgumentTypeError(
            f"{text!r} is too small for a float64 (it would read as 0); give 0 or a larger value"
        )
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
        "optional for label folders (else sizes from the image files); a COCO JSON split "
        "carries its own images (refused with one)",
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
        help=f"preset ({', '.join(ALL_PRESETS)}) or a JSON file with a custom preset",
    )
    score.add_argument("--format", choices=("table", "json"), default="table")
    score.add_argument(
        "--threshold",
        type=_finite,
        help=f"score cut for the operating point (at_threshold; default {DEFAULT_THRESHOLD}): "
        f"read by {', '.join(PRESETS)} and custom presets; the level presets have none",
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
    score.add_argument(
        "--vis-ratio",
        choices=VIS_RATIO_READINGS,
        default="as-given",
        help="COCO JSON ground truth, how an annotation's vis_ratio key is read: as-given "
        "(default: as the city-scale evaluation script, for miss-rate-cityscale: any "
        "number or boolean as it is, out of 0-1 too, and it wins beside a visibility key; "
        "null or text refused; other protocols see the read visibility; an annotation's "
        "height key is read as given too, for miss-rate-cityscale), read (the "
        "visibility where visibility is absent, out-of-range values left unread: engines "
        "2.9-2.10) or unread (skipped: engines before 2.9.0)",
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
            print(explain.explain(args.a, args.b))
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
        _check_options(args, levels)
        outputs = _outputs(args)  # before any scoring: a bad path wastes no time
        if args.cache:
            cli_files.cache_folder(args.cache)
        protocol = args.protocol if levels else _protocol(args.protocol)
        truth = load_truth(
            args.truth,
            images=args.images,
            fmt=args.truth_format,
            cache_dir=args.cache,
            boxes=args.boxes,
            annotations=args.annotations,
            vis_ratio=args.vis_ratio,
        )
        if not levels and args.protocol not in PRESETS:  # its classes, named by its file
            try:
                protocol.threshold_table(truth.classes, truth.category_names)
            except InputError as e:
                raise InputError(args.protocol, e.message, field=e.field) from None
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
            threshold = DEFAULT_THRESHOLD if args.threshold is None else args.threshold
            result, records = evaluate(
                truth, predictions, protocol, score_threshold=threshold, return_records=True
            )
        writers = {  # (a level protocol has no records, and no outputs: refused above)
            "--records": lambda path: records.save(path, provenance=records_provenance(result)),
            "--records-out": lambda path: export.write(
                path,
                records,
                truth,
                fmt=export.format_of(args.records_out),
                protocol_sha256=result.get("protocol_sha256"),
            ),
        }
        cli_files.write_all({path: (option, writers[option]) for option, path in outputs.items()})
    except InputError as e:
        print(f"error: {e}", file=sys.stderr)
        return EXIT_BAD_INPUT
    if args.format == "json":
        json.dump(result, sys.stdout, indent=2, allow_nan=False)  # strict JSON only
        sys.stdout.write("\n")
    else:
        if setups:
            print(setups_table(result))
        else:
            print(levels_table(result) if levels else table(result))
    return 0


def _check_options(args, levels):
    """Options the run would not read are refused, not ignored."""
    if levels and args.threshold is not None:
        raise InputError(
            "--threshold",
            f"{args.protocol} has no operating point and does not read it; --threshold "
            f"(the score cut of at_threshold) is read by {', '.join(PRESETS)} and custom "
            "presets (a JSON file)",
        )
    if args.images is not None and (args.truth_format or detect_format(args.truth)) == "json":
        raise InputError(
            args.images,
            f"--images is not read with a COCO JSON split ({args.truth}): it carries its own "
            'images (its "images" list); --images is for a CSV split or a label folder',
        )


def records_provenance(result):
    """What the ``--records`` file was scored with (``MatchRecords.save(provenance=)``):
    the result's protocol, versions, box policy, split fingerprint and protocol record."""
    record = result.get("protocol_record", {})
    return {
        "protocol": result.get("protocol"),
        "protocol_version": result.get("protocol_version"),
        "engine_version": result.get("engine_version", ENGINE_VERSION),
        "box_policy": record.get("box_policy"),
        "truth_fingerprint": result.get("truth_fingerprint"),
        "protocol_sha256": result.get("protocol_sha256"),
        "protocol_record": record,
    }


def _outputs(args):
    """``{option: path}`` of the files ``--records`` and ``--records-out`` will write,
    checked before any scoring (``cli_files.outputs``): a file name in an existing
    folder, not an input (nor a file inside an input folder), and not the other output."""
    inputs = [
        ("--truth", args.truth),
        ("--predictions", args.predictions),
        ("--images", args.images),
        ("--protocol", args.protocol if _custom(args.protocol) else None),
    ]
    wanted = (("--records", args.records), ("--records-out", args.records_out))
    return cli_files.outputs(inputs, wanted)


def _custom(protocol):
    """A custom preset's file (not a preset name)."""
    return protocol not in ALL_PRESETS and os.path.isfile(protocol)


#: Set (to anything) to let an internal error end with its traceback.
TRACEBACK_ENV = "BENCHBOOK_TRACEBACK"


def _run():
    """``main`` as the command runs it.

    Quiet when the reader of its output goes away (``... | head``): Python's documented
    way (the ``signal`` module's notes on SIGPIPE) is to point stdout at devnull so the
    interpreter's final flush does not raise again. Text the terminal's encoding cannot
    show is written as escapes. Bad input is exit 2 (``main``); anything else is a bug
    of the engine: one line asking for a report, exit 1, the traceback only with
    ``BENCHBOOK_TRACEBACK`` set."""
    if hasattr(sys.stdout, "reconfigure"):
        sys.stdout.reconfigure(errors="backslashreplace")
    try:
        code = main()
        sys.stdout.flush()
    except BrokenPipeError:
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        code = 1
    except Exception as e:
        if os.environ.get(TRACEBACK_ENV):
            raise
        print(
            f"internal error ({type(e).__name__}: {e}): please report it with the command "
            f"and its input files; {TRACEBACK_ENV}=1 shows the traceback",
            file=sys.stderr,
        )
        code = 1
    return code


if __name__ == "__main__":
    sys.exit(_run())
