"""The miss-rate-versus-FPPI charts' JSON, embedded once per chart (version and compare
pages; the data come from ``releases.selectors.miss_rate``)."""

from django.utils.html import json_script


def embed(entry):
    """Give each of a split entry's miss-rate charts its element ids and script."""
    charts = []
    for i, data in enumerate(entry.get("miss_rate", [])):
        key = f"{entry['split'].pk}-{i}"
        charts.append(
            {"key": key, "data": data, "script": json_script(data, f"missrate-data-{key}")}
        )
    entry["miss_rate_charts"] = charts
