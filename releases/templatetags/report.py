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


@register.filter
def when(value):
    """An ISO 8601 time (as the evidence JSON keeps it) as people read it, in UTC:
    "2026-11-02 14:05 UTC"."""
    import datetime

    if not value:
        return ABSENT
    try:
        moment = datetime.datetime.fromisoformat(str(value))
    except ValueError:
        return value
    if moment.tzinfo is not None:
        moment = moment.astimezone(datetime.UTC)
    return moment.strftime("%Y-%m-%d %H:%M UTC")


@register.filter
def item(mapping, key):
    """``mapping[key]``, or None (a template cannot index a dict by a variable)."""
    return (mapping or {}).get(key)
