"""What a ``Predictions``' ``score_conflicts`` record means for a protocol.

The loaders record where pycocotools or the CityPersons script would order or refuse
scores otherwise than float64 (``loaders.exact_scores``, ``loaders.boolean_scores``,
``loaders.cityscale_booleans``, ``loaders.beyond_float64``); ``ScoreConflictReadings``,
a base of ``data.Predictions``, reads that record back: the refusal or the exact order
a protocol takes, and the detections whose integer score is beyond float64's range.
"""

import numpy as np

#: ``loaders.beyond_float64.OVERFLOWING`` (the engine's containers import no loader).
_OVERFLOWING = "beyond_float64"
_CITY_BOOLEANS = "cityscale_booleans"  # loaders.cityscale_booleans.KEY


def _cap_key(protocol):
    cap = protocol.max_detections_limit
    return "none" if cap is None else str(cap)


class ScoreConflictReadings:
    """The readers of ``Predictions.score_conflicts`` (a base of ``data.Predictions``:
    ``self`` holds ``score_conflicts`` and ``score``)."""

    def score_conflict(self, protocol):
        """The refusal recorded for ``protocol`` (``InputError`` keywords), or None:
        only under the COCO order (``tie_order="image"``) with a per-image cap other
        than the checked ones (100, none), which takes any recorded conflict
        (conservative), an entry without an order (made before orders were kept), or
        an entry's ``"overflow"`` refusal (integer scores beyond float64's range); else
        the ``"booleans"`` refusal (``loaders.boolean_scores.refusal``: scores that
        pycocotools joins as a boolean array)."""
        if not self.score_conflicts or protocol.tie_order != "image":
            return None
        from .loaders import boolean_scores

        found = self._cap_conflict(protocol, boolean_scores.KEY)
        return found or boolean_scores.refusal(
            self.score_conflicts.get(boolean_scores.KEY), protocol
        )

    def _cap_conflict(self, protocol, booleans):
        key = _cap_key(protocol)
        if key in self.score_conflicts:
            entry = self.score_conflicts[key]
            if entry and "overflow" in entry:  # scores beyond float64 (exact_scores)
                return entry["overflow"]
            return entry if entry and "position" not in entry else None
        found = next((c for k, c in self._cap_entries(booleans) if c), None)
        return found if not found or "path" in found else found["overflow"]

    def _cap_entries(self, booleans):
        """The entries of the caps (``score_conflicts`` without ``"cityscale"``, the
        ``booleans`` entries and the detections beyond float64's range)."""
        skip = ("cityscale", booleans, _OVERFLOWING, _CITY_BOOLEANS)
        return [(k, c) for k, c in self.score_conflicts.items() if k not in skip]

    def overflowing(self):
        """Per detection, whether its score is an integer beyond float64's range
        (``loaders.beyond_float64``: read here as infinite, pycocotools' precision fill
        stops at it) — a bool array where the file holds one (all False in a slice
        without one), else None."""
        entry = (self.score_conflicts or {}).get(_OVERFLOWING)
        if entry is None:
            return None
        out = np.zeros(len(self.score), bool)
        out[np.asarray(entry["position"], np.int64)] = True
        return out

    def score_order(self, protocol):
        """pycocotools' order for ``protocol`` where it is not float64's
        (``loaders.exact_scores``): ``(index, rank, key)`` int64 arrays — the
        detections of the classes concerned, their rank within image and class, and
        the class order key (ascending, then image, then file order) — or None."""
        if not self.score_conflicts or protocol.tie_order != "image":
            return None
        entry = self.score_conflicts.get(_cap_key(protocol))
        if not entry or "position" not in entry:
            return None
        return tuple(np.asarray(entry[n], np.int64) for n in ("position", "rank", "key"))

    def cityscale_conflict(self):
        """The refusal recorded for ``miss-rate-cityscale`` (``loaders.exact_scores``),
        or None: only a record made before the CityPersons script's order was kept
        (an entry without it; no ``"cityscale"`` key: any recorded conflict)."""
        if not self.score_conflicts:
            return None
        if "cityscale" in self.score_conflicts:
            entry = self.score_conflicts["cityscale"]
            return entry if entry and "position" not in entry else None
        return next((c for _, c in self._cap_entries("booleans") if c), None)

    def cityscale_booleans(self):
        """The CityPersons script's refusal of boolean scores
        (``loaders.cityscale_booleans``: ``setup``, the first setup where its
        ``accumulate`` joins booleans alone, and the ``InputError`` keywords), or None."""
        return (self.score_conflicts or {}).get(_CITY_BOOLEANS)

    def cityscale_order(self):
        """The CityPersons script's order where it is not float64's: ``(index, rank,
        keys)`` — the detections of the class concerned, their rank within the image,
        and per height range of ``pedestrian_setups.CITYSCALE_HEIGHT_RANGES`` the order key of the
        kept ones (an int64 array, or None where float64's order is the script's) — or
        None."""
        entry = (self.score_conflicts or {}).get("cityscale")
        if not entry or "position" not in entry:
            return None
        keys = [None if k is None else np.asarray(k, np.int64) for k in entry["keys"]]
        return np.asarray(entry["position"], np.int64), np.asarray(entry["rank"], np.int64), keys
