from django.contrib import admin
from django.urls import include, path

urlpatterns = [
    path("admin/", admin.site.urls),
    path("api/", include("releases.api.urls")),
    path("", include("frontend.urls")),
]

handler404 = "releases.api.errors.not_found"
