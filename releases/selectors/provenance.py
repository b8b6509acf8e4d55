"""How a stored number was computed, as its stored result says: the protocol record,
the box policy, the engine version and the ground-truth fingerprint (the results API,
the evidence report and the sign-off's evidence snapshot give the same keys)."""

#: Results carry the full protocol record since engine 2.4.0 (level protocols too).
RECORD_SINCE = "2.4.0"
#: And the digest of their protocol's settings (``Protocol.digest``) since 2.19.0.
DIGEST_SINCE = "2.19.0"


def stored_provenance(card):
    """What a scorecard's stored result records of how its numbers were computed:
    ``evaluation``, ``protocol_version``, ``engine_version``, ``truth_fingerprint``,
    ``protocol_sha256``, ``box_policy`` and ``protocol_record`` (the engine's full
    record, as stored), and ``not_recorded``: ``{key: why}`` for each of these the
    stored result lacks (a result of an older engine), whose value is then None —
    or, for ``box_policy``, the evaluation's own column (the policy it was requested
    and scored under), said so. Nothing is recomputed: needs the card's result."""
    result = card.result or {}
    engine_version = result.get("engine_version") or card.engine_version
    record = result.get("protocol_record") or None
    missing = {}
    if record is None:
        missing["protocol_record"] = (
            f"the stored result (engine {engine_version}) holds no protocol record: "
            f"results carry it since engine {RECORD_SINCE}; score it again for the record"
        )
    fingerprint = result.get("truth_fingerprint")
    if fingerprint is None:
        missing["truth_fingerprint"] = (
            f"the stored result (engine {engine_version}) holds no ground-truth "
            "fingerprint; the split's stored hash is its split_sha256"
        )
    box_policy = (record or {}).get("box_policy")
    if box_policy is None:
        box_policy = getattr(card.evaluation, "box_policy", None)
        missing["box_policy"] = (
            "not in the stored result; this is the evaluation's own policy, the one it "
            "was requested and scored under"
        )
    digest = result.get("protocol_sha256")
    if digest is None and result.get("kind") != "levels":  # level results have none
        missing["protocol_sha256"] = (
            f"the stored result (engine {engine_version}) holds no digest of its protocol: "
            f"results carry it since engine {DIGEST_SINCE}"
        )
    return {
        "evaluation": card.evaluation_id,
        "protocol_version": card.protocol_version,
        "engine_version": engine_version,
        "truth_fingerprint": fingerprint,
        "protocol_sha256": digest,
        "box_policy": box_policy,
        "protocol_record": record,
        "not_recorded": missing,
    }
