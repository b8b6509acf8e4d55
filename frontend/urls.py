from django.contrib.auth import views as auth_views
from django.urls import path

from . import views

urlpatterns = [
    path("login/", auth_views.LoginView.as_view(), name="login"),
    path("logout/", auth_views.LogoutView.as_view(), name="logout"),
    path("", views.overview, name="overview"),
    path("splits/", views.split_list, name="splits"),
    path("splits/load/", views.load_split, name="load-split"),
    path("detectors/new/", views.new_detector, name="new-detector"),
    path("detectors/<int:detector_id>/", views.detector, name="detector"),
    path("detectors/<int:detector_id>/suite/", views.suite, name="suite"),
    path("detectors/<int:detector_id>/upload/", views.upload_predictions, name="upload"),
    path("detectors/<int:detector_id>/compare/", views.compare, name="compare"),
    path(
        "detectors/<int:detector_id>/compare/intervals/",
        views.compare_intervals,
        name="compare-intervals",
    ),
    path("detectors/<int:detector_id>/criteria/", views.release_criteria, name="criteria"),
    path("detectors/<int:detector_id>/webhook/", views.webhook, name="webhook"),
    path("detectors/<int:detector_id>/rescore/", views.rescore_page, name="rescore"),
    path("versions/<int:version_id>/", views.version, name="version"),
    path("versions/<int:version_id>/sign-off/", views.sign_off, name="sign-off"),
    path("versions/<int:version_id>/evidence/", views.evidence, name="evidence"),
    path("versions/<int:version_id>/evidence.json", views.evidence, name="evidence-json"),
    path("versions/<int:version_id>/images/", views.image_list, name="image-list"),
    path("versions/<int:version_id>/confusion/", views.confusion, name="confusion"),
    path(
        "versions/<int:version_id>/images/<int:split_id>/<int:image>/",
        views.image_detail,
        name="image-detail",
    ),
    path(
        "versions/<int:version_id>/images/<int:split_id>/<int:image>/file",
        views.image_file,
        name="image-file",
    ),
    path(
        "evaluations/<int:evaluation_id>/records.<str:fmt>",
        views.records_download,
        name="records-download",
    ),
    path(
        "evaluations/<int:evaluation_id>/predictions",
        views.predictions_download,
        name="predictions-download",
    ),
    path("audit/", views.audit_trail, name="audit"),
    path("audit/verify/", views.verify_audit, name="verify-audit"),
    path("account/tokens/", views.api_tokens, name="tokens"),
    path("splits/<int:split_id>/", views.split, name="split"),
    path("splits/<int:split_id>/images/", views.split_images_upload, name="split-images"),
    path("evaluations/<int:evaluation_id>.json", views.evaluation_status, name="evaluation-status"),
]
