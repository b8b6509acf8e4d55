"""Number formats shared by the pages and the stand-alone evidence report."""

from django import template

register = template.Library()
ABSENT = "—"


@register.filter
def score(value):
    return ABSENT if value is None else f"{value:.3f}"


@register.filter
def delta(value):
    return ABSENT if value is None else f"{value:+.3f}"
