"""The audit trail: every upload, freeze and finished evaluation is an event in a
hash chain; tampering is caught, and the database refuses edits."""

import pytest
from django.core.management import call_command
from django.core.management.base import CommandError
from django.db import DatabaseError, connection, transaction

from releases import services
from releases import triggers as audit_triggers
from releases.audit import verify_audit
from releases.models import AuditEvent

from .conftest import detections_for, upload

pytestmark = pytest.mark.django_db


@pytest.fixture
def trail(version, split, split_truth, users, run_tasks):
    run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("p.json", detections_for(split_truth)),
        users["engineer"],
    )
    return list(AuditEvent.objects.all())


def test_the_flow_is_recorded_in_order(trail):
    kinds = [e.kind for e in trail]
    # The detector's suite v1 (written when it was created), then the upload.
    assert kinds[:2] == ["suite changed", "predictions uploaded"]
    assert kinds.count("evaluation finished") == 2
    assert trail[1].actor == "engineer" and trail[2].actor == "system"
    assert trail[2].previous_hash == trail[1].hash
    assert verify_audit() == (None, trail[-1].hash, len(trail))


def test_split_freeze_is_recorded(users, split_truth, django_capture_on_commit_callbacks):
    from evaluation import services as evaluation_services

    with django_capture_on_commit_callbacks(execute=True):
        split = evaluation_services.load_split(
            name="ring-road", revision=1, truth=upload("r.json", split_truth), created_by="lead"
        )
    event = AuditEvent.objects.get(kind="split frozen")
    assert (event.actor, event.subject, event.payload["sha256"]) == (
        "lead",
        f"split:{split.pk}",
        split.sha256,
    )


@pytest.mark.parametrize(
    "statement",
    [
        "UPDATE releases_auditevent SET actor = 'mallory'",
        "DELETE FROM releases_auditevent",
    ],
)
def test_the_database_refuses_edits(trail, statement):
    with pytest.raises(DatabaseError, match="append-only"):
        with transaction.atomic(), connection.cursor() as cursor:
            cursor.execute(statement)
    assert AuditEvent.objects.count() == len(trail)


@pytest.mark.parametrize(
    "tamper, broken_index",
    [
        (
            'UPDATE releases_auditevent SET payload = \'{"protocol": "coco", "summary": {}}\' WHERE id = {second}',
            1,
        ),
        ("UPDATE releases_auditevent SET actor = 'mallory' WHERE id = {first}", 0),
        ("DELETE FROM releases_auditevent WHERE id = {second}", 1),
    ],
)
def test_a_tampered_chain_is_caught(trail, tamper, broken_index, capsys):
    """Someone with the database's owner rights switches the trigger off and edits."""
    first, second = trail[0].pk, trail[1].pk
    audit_triggers.remove(connection)
    with connection.cursor() as cursor:
        cursor.execute(tamper.replace("{first}", str(first)).replace("{second}", str(second)))
    audit_triggers.install(connection)
    broken, _, _ = verify_audit()
    assert broken == trail[broken_index].pk if "DELETE" not in tamper else broken == trail[2].pk
    with pytest.raises(CommandError, match=f"audit chain broken at event #{broken}"):
        call_command("verify_audit")


def test_verify_command_reports_an_intact_chain(trail, capsys):
    call_command("verify_audit")
    assert (
        f"audit chain intact: {len(trail)} events, head {trail[-1].hash}" in capsys.readouterr().out
    )
