"""One number format everywhere: scores on 0-1 with three decimals, deltas signed."""

import json

from django import template

from releases.templatetags.report import delta, score

register = template.Library()
register.filter("score", score)
register.filter("delta", delta)


@register.filter
def get(mapping, key):
    return mapping.get(key) if mapping else None


@register.filter
def subtract(value, other):
    return None if value is None or other is None else value - other


@register.filter
def percent(value):
    """A confidence level as people write it: 0.95 -> "95 %"."""
    return "" if value is None else f"{100 * value:g} %"


@register.filter
def pretty_json(value):
    return json.dumps(value, indent=2, sort_keys=True, ensure_ascii=False, default=str)


@register.filter
def images_query(outcome):
    """The per-image list's query for an outcome: its split, class and tag, against
    the baseline it was judged with (``releases.selectors.image_list.rule_link``)."""
    from urllib.parse import urlencode

    from releases.selectors.image_list import rule_link

    return urlencode(rule_link(outcome))


@register.filter
def fine_delta(value):
    """A per-image contribution to a change of AP: signed, four decimals (one image
    moves AP by less than the page's usual 0.001)."""
    return "—" if value is None else f"{value:+.4f}"
