"""What a difference in each protocol-record setting does to the numbers, in words
(``explain.differences``, so ``explain`` and the compare page).

A setting's words depend on the measure: ``EFFECTS`` speak of AP (``coco``, ``voc``,
custom protocols); ``KITTI_EFFECTS`` of the difficulty levels' AP; ``MISS_RATE_EFFECTS``
of the log-average miss rate over FPPI points (false positives per image), used when
either record is a miss-rate one; ``LEVEL_EFFECTS`` name the settings only level
records hold (``level_provenance``).
"""

EFFECTS = {
    "name": "a different protocol",
    "version": "a revised version of the protocol: its rules changed (see its description)",
    "matching": "how detections claim boxes; best overlap turns a detection whose best box "
    "is taken into a false positive where greedy matching would let it take the next box, "
    "so it can give lower AP where objects crowd together",
    "iou_thresholds": "the IoU thresholds averaged over; stricter thresholds demand tighter "
    "boxes, and AP over 0.50:0.95 is usually far below AP at 0.50",
    "class_iou_thresholds": "the IoU a detection needs, per class; a class at 0.7 instead of "
    "0.5 gets lower AP and recall",
    "recall_sampling": "where precision is sampled along recall; fewer points sample the "
    "curve more coarsely, and a point at recall 0 (which any correct top detection fills) "
    "raises AP",
    "interpolation": "how the precision curve becomes one number",
    "precision_epsilon": "a tiny term in precision = TP / (TP + FP + epsilon): differences "
    "of 1-2 units in the last place",
    "detection_cap": "detections kept per image and class; a lower cap drops low-scored "
    "detections and lowers recall",
    "tie_order": "the order of tied scores across images; it moves AP only when scores tie",
    "zero_id": "whether a detection matched to the box of annotation id 0 counts as a true "
    "positive; it moves the numbers only of a split that has such a box",
    "difficult": "whether boxes flagged difficult are left out of the count (neither found "
    "nor missed) or scored as any other box; it moves the numbers only of a split with "
    "such flags, and leaving them out usually raises recall and AP",
    "pixel_offset": "the +1 pixel convention makes every box one pixel larger each way, "
    "raising the IoU of small boxes, so small objects match more easily",
    "box_policy": "what happens to boxes leaving the frame; clipping changes the IoU of "
    "overhanging predictions (often raising it), reject refuses such files",
    "area_source": "which areas sort ground truth and detections into size buckets (a "
    "detection's w*h, its mask's RLE area when the file gives masks, its own area when "
    "the first result has a caption key, its keypoints' extent when the file gives "
    "keypoints, its own area, box and id when the file is read as given); it moves the "
    "small/medium/large numbers and which unmatched detections count",
    "size_ranges": "the size bucket bounds; they move the small/medium/large numbers",
    "miss_rate": "how the log-average miss rate is read off the curve",
    "operating_point": "how operating points are chosen",
    "averaged_classes": "the mean runs over different classes, so it is not the same average",
    "absent_classes": "different classes had no (counted) ground truth and were left out",
    "repeated_classes": "classes pycocotools' np.unique lists more than once (a NaN category "
    "id listed twice beside ids beyond 64 bits) count that often in every mean over "
    "classes: a different weighting of the same per-class values",
}

#: Settings only level records hold (difficulty levels and pedestrian setups).
LEVEL_EFFECTS = {
    "kind": "a different kind of result (levels of difficulty, pedestrian setups, or AP "
    "over all boxes): the numbers are about different subsets of the boxes",
    "metric": "a different measure: AP (higher is better) and log-average miss rate (lower "
    "is better) cannot be compared",
    "lower_is_better": "the direction of better differs: the two numbers are different measures",
    "value": "which AP is the headline value (AP_R40 or the 11-point AP_R11)",
    "description": "the protocol's own description of its rules",
    "levels": "the levels or setups (height, visibility, occlusion, truncation ranges): "
    "which boxes count at each, so each level is scored on another subset",
    "headline_level": "the level whose number is the headline",
    "neighbours": "classes whose boxes are ignored (neither found nor missed) for an "
    "evaluated class",
    "class_overlap": "the overlap a detection needs, per class; a stricter one turns near "
    "misses into false positives",
    "variant": "whose published code's reading rules apply (clamp, FPPI points, the miss "
    "rate where the curve has no point, NaN score order)",
    "iou_threshold": "the IoU a detection needs to find a box; a stricter one turns near "
    "misses into false positives and missed boxes, raising the miss rate",
    "ignore_overlap": "how a detection is matched to an ignore box; a looser rule lets more "
    "detections vanish into ignore boxes instead of counting as false positives",
    "height_expansion": "detections are kept in the setup's height range widened by this "
    "factor, so detections just outside the range can still match (or count as false "
    "positives)",
    "max_detections": "detections kept per image, by score, before the curve is built; a "
    "cap cuts the curve's high-FPPI end, which can raise the miss rate there",
    "fppi_points": "the FPPI points the log-average runs over; other or rounded points "
    "read the curve at other places",
    "clamp": "the floor a miss rate is raised to before its logarithm; without one a miss "
    "rate of 0 at any point makes the log-average 0",
    "empty_budget": "the miss rate at an FPPI point no curve point reaches: 1 (toolbox), or "
    "1 minus the curve's last, highest recall (city-scale code), which is lower when the "
    "first detections are false positives",
    "aspect_ratio": "counted boxes and detections resized to this width/height ratio about "
    "their centre before matching: every IoU changes",
    "height_upper": "whether a counted box may reach the setup's upper height bound "
    "(closed) or must stay below it (open): boxes at the bound count or not",
    "ignore_flags": "which flags of the file make a box an ignore box; a box whose crowd or "
    "difficult flag is not read counts as a box to find, so missing it raises the miss rate",
    "evaluated_classes": "which classes are scored: every class, or only the category of "
    "id 1 as the city-scale code does; the setups' numbers run over different classes",
}

#: Miss-rate words for settings ``EFFECTS`` describes in AP terms.
MISS_RATE_EFFECTS = {
    "matching": "how detections claim boxes and ignore regions; it decides which "
    "detections are true or false positives, so it moves the miss rate at every FPPI point",
    "iou_thresholds": LEVEL_EFFECTS["iou_threshold"],
    "class_iou_thresholds": "the IoU a detection needs, per class; a stricter one raises "
    "that class's miss rate",
    "recall_sampling": "the FPPI points (false positives per image) at which the miss rate "
    "is read off the curve, and the rule where no curve point lies at or below one; other "
    "or rounded points read the curve at other places",
    "interpolation": "how the miss rates at the FPPI points become one number (the "
    "log-average: a geometric mean, with or without a clamp)",
    "detection_cap": LEVEL_EFFECTS["max_detections"],
    "tie_order": "the order of detections tied in score (and where NaN scores rank) along "
    "the curve; it moves the miss rate only when scores tie",
    "area_source": "setups sort boxes by height and visibility, not area; a difference "
    "here says that one result is not a miss-rate one, or that the splits' visibility was "
    "read from other keys (one read an annotation's vis_ratio key, the other did not; or "
    "one read it as given, out of 0-1 too and over a visibility key, as the city-scale "
    "script does, the other only where no visibility is given and within 0-1), or their "
    "heights (one took an annotation's height key as the city-scale script does, the "
    "other the box's h)",
    "size_ranges": "setups have no size buckets; a difference here says that one result is "
    "not a miss-rate one",
    "miss_rate": "how the miss rate is read at each FPPI point: the rule where the curve "
    "has no point at or below it, and the clamp",
    "averaged_classes": "the headline runs over different classes, so it is not the same miss rate",
    "absent_classes": "different classes had no counted box in the headline setup and "
    "were left out",
}

#: Difficulty-level (KITTI) words for settings ``EFFECTS`` describes otherwise.
KITTI_EFFECTS = {
    "matching": "how detections claim boxes: the KITTI devkit lets each ground-truth box "
    "take a detection (overlap strictly above the threshold) and don't-care regions absorb "
    "false positives, so true and false positives differ from greedy or best-overlap "
    "matching",
    "recall_sampling": "where precision is sampled: the devkit takes score thresholds at "
    "recall steps of 1/40 from the true positives' scores; AP_R40 leaves out the point at "
    "recall 0 that 11-point AP includes (and which raises it)",
    "tie_order": "the order in which boxes take detections of equal score; it moves AP "
    "only when scores tie",
    "area_source": "levels sort boxes by height, occlusion and truncation, not area",
    "size_ranges": "levels have no size buckets: other subsets of the boxes are scored",
}

_ORDER = {
    key: k
    for k, key in enumerate(
        dict.fromkeys(("name", "version", "metric", "kind", *EFFECTS, *LEVEL_EFFECTS))
    )
}


def order(key):
    """Sort key of a setting: name, version and the measure first, then the record's
    order, level settings after, others last."""
    return _ORDER.get(key, len(_ORDER))


def effect(key, a, b):
    """The words for a difference in ``key`` between protocol records ``a`` and ``b``:
    miss-rate words when either is a miss-rate record, KITTI words when either is a
    difficulty-level one, else the AP words."""
    if key == "version" and a.get("name") != b.get("name"):
        return "the versions of two different protocols (see name)"
    # a hand-edited record may hold any JSON there: only text names a kind
    kinds = {v for r in (a, b) for v in (r.get("metric"), r.get("kind")) if isinstance(v, str)}
    if "miss_rate" in kinds:
        tables = (MISS_RATE_EFFECTS, LEVEL_EFFECTS, EFFECTS)
    elif "levels" in kinds:
        tables = (KITTI_EFFECTS, LEVEL_EFFECTS, EFFECTS)
    else:
        tables = (EFFECTS, LEVEL_EFFECTS)
    for table in tables:
        if key in table:
            return table[key]
    return "a different setting"
