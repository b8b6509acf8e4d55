"""Results, decisions and the audit trail cannot be changed unseen.

The database refuses UPDATE, DELETE and TRUNCATE of results, decisions and audit events
and any change to a finished evaluation; on PostgreSQL the application's role (which
owns nothing) cannot switch the triggers off either. What an owner does with the
triggers off, ``verify_audit`` reports: the chain carries a digest of every result,
re-derived from the rows, and its head is also kept in a file outside the database.

Attacks tried, by entry point: raw SQL as the test run (owner) with triggers on; raw SQL
as the application role (PostgreSQL); the owner with the triggers off or dropped; the
chain's tail deleted; the chain recomputed from an event on; a table truncated."""

import os
import secrets
import uuid

import pytest
from django.db import DatabaseError, connection, transaction

from evaluation.models import ClassScore, Evaluation, Scorecard, SliceScore
from releases import services
from releases.db_roles import append_only_tables
from releases.models import AuditEvent, SignOff

from .conftest import detections_for, triggers_off, upload

ON_POSTGRES = connection.vendor == "postgresql"
RULES = [{"kind": "min_value", "metric": "AP50", "class": "pedestrian", "threshold": 0.99}]


def needs_postgres():
    """PostgreSQL-only cases skip on the embedded SQLite, never under CI=true."""
    if not ON_POSTGRES:
        if os.environ.get("CI") == "true":
            pytest.fail("CI=true needs DATABASE_URL on PostgreSQL")
        pytest.skip("PostgreSQL only (set DATABASE_URL)")


def _decided(version, split, split_truth, users, run_tasks):
    from releases import criteria

    run_tasks(criteria.set_criteria, version.detector, users["lead"], RULES)  # outcomes exist
    run_tasks(
        services.submit_predictions,
        version,
        split,
        upload("p.json", detections_for(split_truth)),
        users["engineer"],
    )
    run_tasks(services.sign_off, version, users["lead"], "rejected", "pedestrians at night weak")
    from evaluation import protocols

    protocols.store({"name": "iou60", "base": "coco", "iou_thresholds": [0.6]}, "lead")
    return version


@pytest.fixture
def decided(db, version, split, split_truth, users, run_tasks):
    """A version scored under two protocols, judged against one rule (failed) and
    rejected by its lead."""
    return _decided(version, split, split_truth, users, run_tasks)


def _refused(sql, params=()):
    with pytest.raises(DatabaseError) as caught:
        with transaction.atomic(), connection.cursor() as cursor:
            cursor.execute(sql, params)
    return str(caught.value)


PROTECTED = [
    ("evaluation_scorecard", "stored results"),
    ("evaluation_classscore", "stored results"),
    ("evaluation_slicescore", "stored results"),
    ("evaluation_errorbreakdown", "stored results"),
    ("evaluation_imageleaveoneout", "stored results"),
    ("evaluation_storedprotocol", "a stored protocol"),
    ("releases_signoff", "a release decision"),
    ("releases_judgement", "a judgement"),
    ("releases_outcome", "an outcome of a judgement"),
    ("releases_auditevent", "the audit trail"),
]


@pytest.mark.django_db
@pytest.mark.parametrize("table, what", PROTECTED)
@pytest.mark.parametrize("statement", ["UPDATE {t} SET id = id", "DELETE FROM {t}"])
def test_the_database_refuses_changes_to_append_only_tables(decided, table, what, statement):
    before = {m: m.objects.count() for m in (Scorecard, ClassScore, SliceScore, SignOff)}
    message = _refused(statement.format(t=table))
    assert f"{what} is append-only" in message
    assert {m: m.objects.count() for m in before} == before


def test_every_append_only_table_is_listed():
    """The privileges (``db_roles``) and this test read the same list."""
    assert sorted(append_only_tables()) == sorted(
        [t for t, _ in PROTECTED] + ["evaluation_benchmarksplit"]
    )


@pytest.mark.django_db
@pytest.mark.parametrize(
    "column, value",
    [
        ("state", "queued"),
        ("state", "failed"),
        ("error", "edited"),
        ("engine_version", "0.0"),
        ("finished_at", None),
        ("protocol", "voc07"),
        ("box_policy", "clip"),
        ("scope", "team:999"),  # would hand it to another team
        ("file_name", "other.json"),
    ],
)
def test_a_finished_evaluation_cannot_change(decided, column, value):
    evaluation = Evaluation.objects.filter(state="done").first()
    message = _refused(
        f"UPDATE evaluation_evaluation SET {column} = %s WHERE id = %s", [value, evaluation.pk]
    )
    assert "evaluation is finished" in message or "is finished (done)" in message
    assert getattr(Evaluation.objects.get(pk=evaluation.pk), column) == getattr(evaluation, column)


@pytest.mark.django_db
def test_a_finished_evaluation_cannot_be_deleted(decided):
    evaluation = Evaluation.objects.filter(state="done").first()
    _refused("DELETE FROM evaluation_scorecard WHERE evaluation_id = %s", [evaluation.pk])
    assert "is finished" in _refused(
        "DELETE FROM evaluation_evaluation WHERE id = %s", [evaluation.pk]
    )


@pytest.mark.django_db
def test_an_unfinished_evaluation_still_moves(version, split, split_truth, users, monkeypatch):
    """The guard is on finished rows only: queued → running → done is the worker's job."""
    from evaluation import services as evaluation_services

    monkeypatch.setattr("evaluation.services.queueing.dispatch", lambda pk: None)
    services.submit_predictions(
        version, split, upload("p.json", detections_for(split_truth)), users["engineer"]
    )
    evaluation = Evaluation.objects.first()
    evaluation_services.run_evaluation(evaluation.pk)
    assert Evaluation.objects.get(pk=evaluation.pk).state == "done"


@pytest.fixture
def committed(flushable, version, split, split_truth, users, run_tasks):
    """``decided``, committed (TRUNCATE is refused in a transaction with pending
    constraint checks whatever the triggers say; these tests need the real refusal)."""
    return _decided(version, split, split_truth, users, run_tasks)


@pytest.mark.parametrize(
    "table",
    [t for t, _ in PROTECTED] + ["evaluation_benchmarksplit", "evaluation_evaluation"],
)
def test_the_database_refuses_truncate_even_to_its_owner(committed, table):
    """PostgreSQL's TRUNCATE skips row triggers; a statement trigger refuses it (the
    issue's attack: TRUNCATE of the audit table, and of splits cascading)."""
    needs_postgres()
    message = _refused(f"TRUNCATE {table} CASCADE")
    assert "TRUNCATE" in message and "refused" in message
    assert AuditEvent.objects.exists() and Scorecard.objects.exists()


@pytest.fixture
def app_role(committed):
    """A login role that owns nothing, given the application's privileges by
    ``manage.py grant_app_role`` as the README says; dropped afterwards."""
    from django.core.management import call_command

    needs_postgres()
    role, password = f"bb_app_{uuid.uuid4().hex[:10]}", secrets.token_hex(16)
    with connection.cursor() as cursor:
        cursor.execute(f"CREATE ROLE {role} LOGIN PASSWORD '{password}'")
    try:
        call_command("grant_app_role", role, verbosity=0)
        yield role, password
    finally:
        with connection.cursor() as cursor:
            cursor.execute(f"DROP OWNED BY {role}")  # its privileges in this database
            cursor.execute(f"DROP ROLE {role}")


def _connect_as(role, password):
    import psycopg

    db = connection.settings_dict
    return psycopg.connect(
        host=db["HOST"] or "127.0.0.1",
        port=db["PORT"] or 5432,
        dbname=db["NAME"],
        user=role,
        password=password,
        autocommit=True,
    )


ATTACKS = [
    "UPDATE {t} SET id = id",
    "DELETE FROM {t}",
    "TRUNCATE {t} CASCADE",
    "ALTER TABLE {t} DISABLE TRIGGER ALL",
    "ALTER TABLE {t} DISABLE TRIGGER USER",
    "DROP TRIGGER benchbook_no_truncate ON {t}",
    "DROP TABLE {t} CASCADE",
]


def test_the_application_role_cannot_change_empty_or_unguard_protected_tables(app_role):
    """As the role the web processes and workers log in as: every UPDATE, DELETE and
    TRUNCATE of audit, result and decision rows is refused (PostgreSQL docs: TRUNCATE
    needs the TRUNCATE privilege, ALTER/DROP of a table or its triggers needs ownership,
    session_replication_role is superuser-only)."""
    import psycopg

    tables = [t for t, _ in PROTECTED] + ["evaluation_benchmarksplit"]
    counts = {t: _count(t) for t in tables}
    refused = {}
    with _connect_as(*app_role) as conn:
        for table in tables:
            assert conn.execute(f"SELECT count(*) FROM {table}").fetchone()[0] == counts[table]
            for attack in ATTACKS:
                with pytest.raises(psycopg.Error) as caught:
                    conn.execute(attack.format(t=table))
                refused[attack.format(t=table)] = type(caught.value).__name__
        with pytest.raises(psycopg.errors.InsufficientPrivilege):
            conn.execute("SET session_replication_role = replica")  # would skip triggers
        with pytest.raises(psycopg.errors.InsufficientPrivilege):
            conn.execute("DELETE FROM evaluation_evaluation")
        with pytest.raises(psycopg.errors.RestrictViolation, match="is finished"):
            conn.execute("UPDATE evaluation_evaluation SET state = 'queued'")
    assert {t: _count(t) for t in tables} == counts
    # no privilege for any of it (and the triggers stop the owner: tests above)
    assert set(refused.values()) == {"InsufficientPrivilege"}, refused


def test_migrate_grants_the_application_role_on_a_new_table(app_role):
    """With ``BENCHBOOK_DB_APP_ROLE`` set, every ``migrate`` ends by granting the role
    its privileges again: a table that appeared since the last grant (as a new migration
    creates one) is usable by the role at once, and the append-only tables stay closed
    to it. Without the setting the new table stays out of reach (the old failure)."""
    import psycopg
    from django.core.management import call_command
    from django.test import override_settings

    role, password = app_role
    with connection.cursor() as cursor:
        cursor.execute("CREATE TABLE benchbook_probe (id serial PRIMARY KEY, note text)")
    try:
        with override_settings(BENCHBOOK_DB_APP_ROLE=""):
            call_command("migrate", verbosity=0)
        with _connect_as(role, password) as conn:
            with pytest.raises(psycopg.errors.InsufficientPrivilege):
                conn.execute("INSERT INTO benchbook_probe (note) VALUES ('before')")
        with override_settings(BENCHBOOK_DB_APP_ROLE=role):  # (flush re-sends post_migrate)
            call_command("migrate", verbosity=0)
        with _connect_as(role, password) as conn:
            conn.execute("INSERT INTO benchbook_probe (note) VALUES ('after')")
            assert conn.execute("SELECT note FROM benchbook_probe").fetchall() == [("after",)]
            with pytest.raises(psycopg.errors.InsufficientPrivilege):
                conn.execute("TRUNCATE releases_auditevent CASCADE")
            with pytest.raises(psycopg.errors.InsufficientPrivilege):
                conn.execute("DELETE FROM evaluation_scorecard")
    finally:
        with connection.cursor() as cursor:
            cursor.execute("DROP TABLE benchbook_probe")


def _count(table):
    with connection.cursor() as cursor:
        cursor.execute(f"SELECT count(*) FROM {table}")
        return cursor.fetchone()[0]


def test_the_application_runs_as_that_role(
    app_role, users, detector, split, split_truth, run_tasks
):
    """The privileges are enough for the application's own work: a version uploaded,
    scored, judged and decided with Django connected as the role."""
    from releases.models import ModelVersion

    db = connection.settings_dict
    saved = db["USER"], db["PASSWORD"]
    connection.close()
    db["USER"], db["PASSWORD"] = app_role
    try:
        with connection.cursor() as cursor:
            cursor.execute("SELECT current_user")
            assert cursor.fetchone()[0] == app_role[0]
        version = services.create_version(detector, "1.5.0", users["engineer"])
        _decided(version, split, split_truth, users, run_tasks)
        assert set(Evaluation.objects.filter(state="done").values_list("protocol", flat=True)) == {
            "coco",
            "voc",
        }
        assert ModelVersion.objects.get(pk=version.pk).sign_off.decision == "rejected"
    finally:
        connection.close()
        db["USER"], db["PASSWORD"] = saved


# The hash chain covers the results -------------------------------------------------


def _as_owner(*statements):
    """The owner of the tables switches the triggers off, edits, and switches them on."""
    with triggers_off(), connection.cursor() as cursor:
        for statement in statements:
            cursor.execute(statement)


def _verify(*args):
    """``manage.py verify_audit``: (True, stdout) or (False, the error's text)."""
    from io import StringIO

    from django.core.management import call_command
    from django.core.management.base import CommandError

    out = StringIO()
    try:
        call_command("verify_audit", *args, stdout=out)
    except CommandError as e:
        return False, str(e)
    return True, out.getvalue()


@pytest.mark.django_db
def test_every_finished_result_is_chained_with_the_digests_of_its_rows(decided):
    from releases.audit_check import result_digests

    events = AuditEvent.objects.filter(kind="evaluation finished")
    assert events.count() == 2
    for event in events:
        evaluation_id = int(event.subject.split(":")[1])
        assert event.payload["result"] == result_digests(evaluation_id)
        assert set(event.payload["result"]) == {
            "format",
            "evaluation",
            "scorecard",
            "classes",
            "slices",
            "slice_metrics",
            "slice_miss_rate",
            "records",
            "unknown_images",
            "unknown_classes",
        }
    ok, out = _verify()
    count = AuditEvent.objects.count()
    assert (
        ok
        and f"audit chain intact: {count} events" in out
        and "2 results, 1 judgements and 1 decisions re-derived" in out
    )


def _pedestrian(field="ap"):
    row = ClassScore.objects.filter(class_name="pedestrian").order_by("pk").first()
    return row.scorecard.evaluation_id, getattr(row, field)


EDITS = [
    (
        "UPDATE evaluation_classscore SET ap = 0.999 WHERE class_name = 'pedestrian'",
        "no longer matches its digest (classes)",
    ),
    ("DELETE FROM evaluation_classscore WHERE class_name = 'cyclist'", "(classes)"),
    ("UPDATE evaluation_slicescore SET ap = 0.5 WHERE kind = 'size'", "(slices)"),
    ("UPDATE evaluation_slicescore SET recall = 0.5 WHERE kind = 'size'", "(slice_metrics)"),
    (
        "UPDATE evaluation_scorecard SET summary = '{\"AP\": 0.9}'",
        "no longer matches its digest (scorecard)",
    ),
    ("UPDATE evaluation_evaluation SET state = 'failed', error = 'x'", "(evaluation)"),
    ("UPDATE evaluation_evaluation SET engine_version = '0.1'", "(evaluation)"),
    # The image policy decides which predictions were scored (drop-and-count re-scores).
    ("UPDATE evaluation_evaluation SET unknown_images = 'drop'", "(unknown_images)"),
    # The class policy decides whether a file naming unlisted classes was scored.
    ("UPDATE evaluation_evaluation SET unknown_classes = 'reject'", "(unknown_classes)"),
    (
        "DELETE FROM evaluation_errorbreakdown; DELETE FROM evaluation_imageleaveoneout; "
        "DELETE FROM evaluation_slicescore; "
        "DELETE FROM evaluation_classscore; "
        "DELETE FROM evaluation_scorecard",
        "(scorecard, classes, slices, slice_metrics, records)",
    ),
    ("UPDATE releases_signoff SET decision = 'approved'", "no longer reads as recorded (decision)"),
    ("UPDATE releases_signoff SET comment = 'fine'", "no longer reads as recorded (comment)"),
    ("DELETE FROM releases_signoff", "the decision on version {version} is gone"),
    ("UPDATE releases_judgement SET verdict = 'pass'", "no longer reads as recorded (verdict"),
    ("UPDATE releases_judgement SET reasons = '[]'", "no longer reads as recorded (reasons)"),
    # What the candidate was compared with: the baseline's evaluations (a re-scored one).
    (
        'UPDATE releases_judgement SET baseline_evaluations = \'{"1": "done"}\'',
        "no longer reads as recorded (baseline_evaluations)",
    ),
    ("UPDATE releases_outcome SET status = 'pass'", "no longer reads as recorded (outcomes,"),
    ("DELETE FROM releases_outcome", "no longer reads as recorded (outcomes"),
    # A value or bound edited, the status left alone: only the outcome values show it.
    ("UPDATE releases_outcome SET value = 0.999", "no longer reads as recorded (outcome_values)"),
    ("UPDATE releases_outcome SET detail = 'fine'", "(outcome_values)"),
    (
        'UPDATE releases_outcome SET rule = \'{"kind": "min_value", "metric": "AP50", '
        '"class": "pedestrian", "threshold": 0.1}\'',
        "(outcome_values)",
    ),
    ("DELETE FROM releases_auditevent WHERE kind = 'judged'", "is not in the chain"),
    (
        "DELETE FROM releases_auditevent WHERE kind = 'rejected'",
        "the decision on version {version} is not in the chain",
    ),
    ("DELETE FROM releases_auditevent WHERE id > 1", "is finished but not in the chain"),
    ("DELETE FROM releases_auditevent", "is finished but not in the chain"),
]


@pytest.mark.django_db
@pytest.mark.parametrize("edit, finding", EDITS)
def test_verify_audit_reports_rows_edited_by_the_owner(decided, edit, finding):
    """The issue's attacks: scorecards, class rows, evaluation states and decisions
    edited (or removed) with the triggers off, the chain's tail cut, the audit table
    emptied — the chain itself may still be consistent; the rows no longer match it."""
    assert _verify()[0]
    _as_owner(*edit.split(";"))
    ok, text = _verify()
    assert not ok
    assert finding.format(version=decided.pk) in text, text


@pytest.mark.django_db
def test_a_replaced_records_file_is_reported(decided):
    """The match records (.npz) behind intervals and re-scoring are in the digest."""
    card = Scorecard.objects.order_by("pk").first()
    with card.records.storage.open(card.records.name, "wb") as f:
        f.write(b"not the records")
    ok, text = _verify()
    assert (
        not ok and f"evaluation {card.evaluation_id} no longer matches its digest (records)" in text
    )


# The chain's head, kept outside the database ------------------------------------------


@pytest.fixture
def head_file(settings, tmp_path):
    settings.BENCHBOOK_AUDIT_HEAD_FILE = str(tmp_path / "audit-head.log")
    return tmp_path / "audit-head.log"


@pytest.fixture
def headed(head_file, decided, users, run_tasks, split, split_truth, detector, monkeypatch):
    """``decided`` with a head file, and a newer version's upload last in the chain
    (nothing derived from rows vouches for an upload event)."""

    monkeypatch.setattr("evaluation.services.queueing.dispatch", lambda pk: None)
    newer = services.create_version(detector, "1.5.0", users["engineer"])
    run_tasks(
        services.submit_predictions,
        newer,
        split,
        upload("q.json", detections_for(split_truth, seed=9)),
        users["engineer"],
    )
    return head_file


@pytest.mark.django_db
def test_the_head_file_gets_every_event(headed):
    lines = headed.read_text().splitlines()
    assert lines == [f"{pk} {h}" for pk, h in AuditEvent.objects.values_list("pk", "hash")]
    ok, out = _verify("--head", str(headed))
    assert ok and f"matches {headed}" in out


def _rewrite_chain_from(first_id, drop=(), edit=None, **payload_changes):
    """What an owner who knows the scheme does: edit an event, then recompute every
    digest and hash from that event on, so that the chain verifies again. ``drop``:
    keys removed from every payload from there on; ``edit``: a function applied to
    each of those payloads."""
    import json

    from releases.audit import GENESIS, digest, link_hash

    events = list(AuditEvent.objects.order_by("id"))
    previous = GENESIS
    statements = []
    for event in events:
        if event.pk >= first_id:
            payload = {**event.payload, **(payload_changes if event.pk == first_id else {})}
            payload = {k: v for k, v in payload.items() if k not in drop}
            payload = edit(payload) if edit else payload
            payload_digest = digest(payload)
            new_hash = link_hash(
                previous, event.kind, event.actor, event.created_at, event.subject, payload_digest
            )
            statements.append(
                "UPDATE releases_auditevent SET payload = '{}', payload_digest = '{}', "
                "previous_hash = '{}', hash = '{}' WHERE id = {}".format(
                    json.dumps(payload).replace("'", "''"),
                    payload_digest,
                    previous,
                    new_hash,
                    event.pk,
                )
            )
            previous = new_hash
        else:
            previous = event.hash
    _as_owner(*statements)


def _chain_only():
    """``verify_audit`` with no head file configured: what the chain and rows show."""
    from django.test import override_settings

    with override_settings(BENCHBOOK_AUDIT_HEAD_FILE=None):
        return _verify()


@pytest.mark.django_db
def test_a_deleted_tail_is_caught_by_the_head_file(headed):
    last = AuditEvent.objects.order_by("-id").first()
    assert last.kind == "predictions uploaded"
    _as_owner(f"DELETE FROM releases_auditevent WHERE id = {last.pk}")
    assert _chain_only()[0]  # the rest of the chain is consistent and matches its rows
    ok, text = _verify("--head", str(headed))
    assert not ok and f"event #{last.pk} is missing from the database" in text
    ok, text = _verify()  # the configured head file is checked by default
    assert not ok and f"event #{last.pk} is missing from the database" in text


@pytest.mark.django_db
def test_a_rewritten_chain_is_caught_by_the_head_file(headed, decided):
    """Decision and event edited alike, the chain recomputed from there: only the copy
    of the head outside the database can tell."""
    decision = AuditEvent.objects.get(kind="rejected")
    _as_owner("UPDATE releases_signoff SET comment = 'all good'")
    _rewrite_chain_from(decision.pk, comment="all good")
    assert _chain_only()[0]
    ok, text = _verify("--head", str(headed))
    assert not ok and f"event #{decision.pk} has another hash in the database" in text


@pytest.mark.django_db
def test_an_emptied_audit_table_is_caught_by_the_head_file(headed):
    count = AuditEvent.objects.count()
    _as_owner("DELETE FROM releases_auditevent")
    ok, text = _verify("--head", str(headed))
    assert not ok and text.count("is missing from the database") == count


@pytest.mark.django_db
def test_a_head_file_behind_the_chain_is_a_note_not_a_finding(headed):
    lines = headed.read_text().splitlines()
    headed.write_text("\n".join(lines[:-2]) + "\n")
    ok, out = _verify("--head", str(headed))
    assert ok and "note: 2 event(s) after the head file's last line" in out


@pytest.mark.django_db
def test_a_garbled_head_file_is_reported(headed):
    headed.write_text(headed.read_text() + "seven deadbeef\n")
    ok, text = _verify("--head", str(headed))
    assert not ok and "not 'id hash': 'seven deadbeef'" in text


@pytest.mark.django_db
def test_an_unreadable_head_file_is_an_error(tmp_path, decided):
    ok, text = _verify("--head", str(tmp_path / "nowhere.log"))
    assert not ok and "cannot read the head file" in text


def test_the_truncated_tables_are_reported(head_file, committed):
    """The issue's case: TRUNCATE (here by the owner, triggers off) of results and the
    audit trail; ``verify_audit`` used to say "intact: 0 events"."""
    needs_postgres()
    _as_owner(
        "TRUNCATE releases_auditevent, evaluation_slicescore, evaluation_classscore, "
        "evaluation_errorbreakdown, evaluation_imageleaveoneout, "
        "evaluation_scorecard"
    )
    ok, text = _verify()
    assert not ok and "is finished but not in the chain" in text
    ok, text = _verify("--head", str(head_file))
    assert not ok and "is missing from the database" in text


@pytest.mark.django_db
def test_events_from_before_the_digests_are_a_note_not_a_finding(decided):
    """Events written before result and outcome digests existed (planted by dropping
    the keys, chain recomputed) are checked as far as they go and named in a note."""
    _rewrite_chain_from(
        AuditEvent.objects.order_by("id").first().pk, drop=("result", "outcome_values")
    )
    ok, out = _verify()
    assert ok, out
    assert "note: 2 evaluation event(s) from before result digests" in out
    assert "note: 1 judgement event(s) from before outcome digests" in out


@pytest.mark.django_db
def test_events_from_before_the_policy_and_baseline_digests_verify_as_before(decided):
    """Evaluation events without the ``unknown_images`` part and judged events without
    ``baseline_evaluations`` (recorded before they existed; planted by dropping them,
    chain recomputed) verify as before; an edit of those columns is then not seen, which
    is the limit of old events, not a finding."""

    def without_policy(payload):
        if "result" in payload:
            result = {k: v for k, v in payload["result"].items() if k != "unknown_images"}
            payload = {**payload, "result": result}
        return payload

    first = AuditEvent.objects.order_by("id").first().pk
    _rewrite_chain_from(first, drop=("baseline_evaluations",), edit=without_policy)
    ok, out = _verify()
    assert ok, out
    _as_owner(
        "UPDATE evaluation_evaluation SET unknown_images = 'drop'",
        'UPDATE releases_judgement SET baseline_evaluations = \'{"1": "done"}\'',
    )
    assert _verify()[0]
