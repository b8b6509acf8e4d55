"""One number format everywhere: scores on 0-1 with three decimals, deltas signed."""

from django import template

from releases.templatetags.report import delta, score

register = template.Library()
register.filter("score", score)
register.filter("delta", delta)


@register.filter
def direction(value):
    """CSS class of a delta: worse, better or level (at display precision)."""
    if value is None or abs(value) < 0.0005:
        return "level"
    return "better" if value > 0 else "worse"


@register.filter
def get(mapping, key):
    return mapping.get(key) if mapping else None


@register.filter
def subtract(value, other):
    return None if value is None or other is None else value - other
