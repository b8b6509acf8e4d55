"""Evaluations are per team (``Evaluation.scope``): an evaluation that sets of several
teams shared stays with the team that asked first; every other team's sets are linked
to a new evaluation of their own, queued, which the sweep sends to be scored again."""

from django.db import migrations


def scope_existing(apps, schema_editor):
    Evaluation = apps.get_model("evaluation", "Evaluation")
    PredictionSet = apps.get_model("releases", "PredictionSet")
    Link = PredictionSet.evaluations.through
    for evaluation in Evaluation.objects.filter(scope="").order_by("pk"):
        by_team = {}  # team id -> its sets linked to this evaluation, oldest first
        links = Link.objects.filter(evaluation_id=evaluation.pk).order_by("predictionset_id")
        for link in links.select_related("predictionset__version__detector"):
            team_id = link.predictionset.version.detector.team_id
            by_team.setdefault(team_id, []).append(link.predictionset)
        if not by_team:
            continue  # requested outside releases: no team
        first, *others = by_team
        Evaluation.objects.filter(pk=evaluation.pk).update(
            scope=f"team:{first}", file_name=by_team[first][0].file_name
        )
        for team_id in others:
            own, _ = Evaluation.objects.get_or_create(
                split_id=evaluation.split_id,
                predictions_id=evaluation.predictions_id,
                protocol=evaluation.protocol,
                box_policy=evaluation.box_policy,
                scope=f"team:{team_id}",
                defaults={"file_name": by_team[team_id][0].file_name},
            )
            for prediction_set in by_team[team_id]:
                links.filter(predictionset_id=prediction_set.pk).delete()
                Link.objects.get_or_create(predictionset_id=prediction_set.pk, evaluation_id=own.pk)


class Migration(migrations.Migration):
    dependencies = [
        ("evaluation", "0008_evaluation_scope"),
        ("releases", "0014_append_only_decisions"),
    ]

    operations = [migrations.RunPython(scope_existing, migrations.RunPython.noop)]
