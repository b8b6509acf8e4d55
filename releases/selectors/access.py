"""Who may see what: teams, detectors, versions, evaluations, audit events."""

from ..models import Detector, Membership, PredictionSet, Team

UPLOAD_ROLES = (Membership.Role.ENGINEER, Membership.Role.LEAD)


# Shown beside every release decision and in evidence reports (releases/client keeps a
# copy: it imports nothing of the project).
CAUTION = (
    "Benchmark metrics support, and do not replace, the safety validation of a perception "
    "system under the applicable standards (for example ISO 26262, ISO 21448, UL 4600) and "
    "your organisation's release process."
)


def reads_all_teams(user):
    """Safety review is cross-team: a reviewer role anywhere (or a superuser) reads all."""
    return user.is_superuser or (
        Membership.objects.filter(user=user, role=Membership.Role.REVIEWER).exists()
    )


def visible_teams(user):
    """Members see their teams; anyone holding a reviewer role reads every team."""
    if not user.is_authenticated:
        return Team.objects.none()
    if reads_all_teams(user):
        return Team.objects.all()
    return Team.objects.filter(memberships__user=user)


def visible_detectors(user):
    return Detector.objects.filter(team__in=visible_teams(user)).select_related("team")


def role_in(user, team):
    membership = Membership.objects.filter(user=user, team=team).first()
    return membership.role if membership else None


def lead_teams(user):
    """The teams ``user`` leads, by name: where they may create detectors."""
    return list(
        Team.objects.filter(
            memberships__user=user, memberships__role=Membership.Role.LEAD
        ).order_by("name")
    )


def detector_for(user, detector_id):
    """The detector if ``user`` may see it, else ``Detector.DoesNotExist``."""
    return visible_detectors(user).get(pk=detector_id)


def version_for(user, version_id):
    """A version of a visible detector, else ``ModelVersion.DoesNotExist``."""
    from ..models import ModelVersion

    return ModelVersion.objects.select_related(
        "detector__team", "created_by", "sign_off__decided_by"
    ).get(pk=version_id, detector__in=visible_detectors(user))


def evaluations_of(version):
    """The evaluations the version's current prediction sets asked for, with split and
    file (one query)."""
    from evaluation.models import Evaluation

    return list(
        Evaluation.objects.filter(
            prediction_sets__in=version.prediction_sets.current().values("pk")
        )
        .distinct()
        .select_related("split", "predictions")
        .order_by("split__name", "split__revision", "protocol")
    )


def evaluation_for(user, evaluation_id):
    """An evaluation the user may see: one a visible detector's prediction set asked
    for (identical bytes of another team share the row, not its visibility)."""

    return visible_evaluations(user).select_related("split", "predictions").get(pk=evaluation_id)


def can_attach_split_images(user):
    """Leads (of any team) give a split its images: one image source per split, for
    good, shown to every team that reads a version scored on it (DEVELOPERS.md,
    "Permissions")."""
    return (
        user.is_superuser
        or Membership.objects.filter(user=user, role=Membership.Role.LEAD).exists()
    )


def can_load_splits(user):
    """Splits are shared benchmarks: engineers and leads of any team may load them."""
    return user.is_superuser or Membership.objects.filter(user=user, role__in=UPLOAD_ROLES).exists()


def visible_audit_events(user):
    """Reviewers (anywhere) read the whole trail; members read the events about their
    teams' detectors, versions, prediction sets and evaluations, and split events."""
    from django.db.models import CharField, Q, Value
    from django.db.models.functions import Cast, Concat

    from ..models import AuditEvent, ModelVersion

    events = AuditEvent.objects.all()
    if not user.is_authenticated:
        return events.none()
    if reads_all_teams(user):
        return events

    def subjects(queryset, prefix):
        return queryset.annotate(
            subject_key=Concat(Value(prefix), Cast("pk", CharField()), output_field=CharField())
        ).values("subject_key")

    detectors = visible_detectors(user)
    sets = PredictionSet.objects.filter(version__detector__in=detectors)
    return events.filter(
        Q(subject__startswith="split:")
        | Q(subject__in=subjects(Detector.objects.filter(pk__in=detectors), "detector:"))
        | Q(subject__in=subjects(ModelVersion.objects.filter(detector__in=detectors), "version:"))
        | Q(subject__in=subjects(sets, "prediction-set:"))
        | Q(subject__in=subjects(visible_evaluations(user), "evaluation:"))
    )


def visible_evaluations(user):
    """Evaluations that prediction sets of visible detectors asked for."""
    from django.db.models import Exists, OuterRef

    from evaluation.models import Evaluation

    return Evaluation.objects.filter(
        Exists(visible_set_links(user).filter(evaluation_id=OuterRef("pk")))
    )


def visible_set_links(user):
    """Links (prediction set -> evaluation) of the visible detectors' sets: filters by
    owner (detector, version) go through these, so another team's id matches nothing."""
    return PredictionSet.evaluations.through.objects.filter(
        predictionset__version__detector__in=visible_detectors(user)
    )
