"""The overview: every detector the user may see, its baseline and newest candidates."""

from django.contrib.auth.decorators import login_required
from django.shortcuts import render

from releases import selectors


@login_required
def overview(request):
    return render(
        request,
        "frontend/overview.html",
        {
            "rows": selectors.overview_for(request.user),
            "can_create": bool(selectors.lead_teams(request.user)),
        },
    )
