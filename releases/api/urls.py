from django.urls import include, path
from drf_spectacular.views import SpectacularAPIView, SpectacularSwaggerView

from . import views

v1 = [
    path("me/", views.Me.as_view(), name="me"),
    path("detectors/", views.DetectorList.as_view(), name="detectors"),
    path("detectors/<int:pk>/", views.DetectorDetail.as_view(), name="detector"),
    path("detectors/<int:pk>/history/", views.DetectorHistory.as_view(), name="history"),
    path("detectors/<int:pk>/criteria/", views.DetectorCriteria.as_view(), name="criteria"),
    path("detectors/<int:pk>/suite/", views.DetectorSuite.as_view(), name="suite"),
    path("detectors/<int:pk>/rescore/", views.DetectorRescore.as_view(), name="rescore"),
    path("versions/", views.VersionList.as_view(), name="versions"),
    path("versions/<int:pk>/", views.VersionDetail.as_view(), name="version"),
    path("versions/<int:pk>/verdict/", views.VersionVerdict.as_view(), name="verdict"),
    path("versions/<int:pk>/judgements/", views.VersionJudgements.as_view(), name="judgements"),
    path("versions/<int:pk>/results/", views.VersionResults.as_view(), name="results"),
    path("versions/<int:pk>/evidence/", views.VersionEvidence.as_view(), name="evidence"),
    path("versions/<int:pk>/sign-off/", views.VersionSignOff.as_view(), name="sign-off"),
    path("sign-offs/", views.SignOffList.as_view(), name="sign-offs"),
    path("comparisons/", views.Comparison.as_view(), name="comparison"),
    path("splits/", views.SplitList.as_view(), name="splits"),
    path("splits/<int:pk>/", views.SplitDetail.as_view(), name="split"),
    path("splits/<int:pk>/images/", views.SplitImages.as_view(), name="split-images"),
    path("prediction-sets/", views.PredictionSetList.as_view(), name="prediction-sets"),
    path("prediction-sets/<int:pk>/", views.PredictionSetDetail.as_view(), name="prediction-set"),
    path("evaluations/", views.EvaluationList.as_view(), name="evaluations"),
    path("evaluations/<int:pk>/", views.EvaluationDetail.as_view(), name="evaluation"),
    path("evaluations/<int:pk>/result/", views.EvaluationResult.as_view(), name="result"),
    path(
        "evaluations/<int:pk>/records.csv",
        views.EvaluationRecordsCsv.as_view(),
        name="records-csv",
    ),
    path(
        "evaluations/<int:pk>/records.jsonl",
        views.EvaluationRecordsJsonl.as_view(),
        name="records-jsonl",
    ),
    path(
        "evaluations/<int:pk>/predictions",
        views.EvaluationPredictions.as_view(),
        name="predictions-file",
    ),
    path("versions/<int:pk>/images/", views.VersionImages.as_view(), name="images"),
    path(
        "versions/<int:pk>/images/<int:split_id>/<int:image>/",
        views.VersionImage.as_view(),
        name="image",
    ),
    path("outcomes/", views.OutcomeList.as_view(), name="outcomes"),
    path("flags/", views.FlagList.as_view(), name="flags"),
    path("audit-events/", views.AuditEventList.as_view(), name="audit-events"),
    path("audit-events/<int:pk>/", views.AuditEventDetail.as_view(), name="audit-event"),
]

urlpatterns = [
    path("v1/", include((v1, "api"), namespace="api")),
    path("schema/", SpectacularAPIView.as_view(), name="schema"),
    path("docs/", SpectacularSwaggerView.as_view(url_name="schema"), name="api-docs"),
]
