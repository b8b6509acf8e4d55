from django.contrib import admin
from django.urls import include, path

urlpatterns = [
    path("admin/", admin.site.urls),
    path("api/", include("releases.api.urls")),
    path("", include("frontend.urls")),
]

handler404 = "frontend.errors.not_found"  # the API's JSON body under /api/
handler403 = "frontend.errors.permission_denied"
handler400 = "frontend.errors.bad_request"  # also 413 for a body over the size limit
