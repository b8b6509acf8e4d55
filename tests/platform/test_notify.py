"""Notifications after judging: e-mail to the leads, a webhook signed with HMAC-SHA256
(RFC 2104), retried with back-off; a failing webhook is reported, not fatal."""

import hashlib
import hmac
import http.server
import json
import threading

import pytest
from django.core import mail
from django.core.exceptions import PermissionDenied

from releases import notify

pytestmark = pytest.mark.django_db


class _Receiver(http.server.BaseHTTPRequestHandler):
    received = []
    status = 200

    def do_POST(self):  # noqa: N802 (http.server's naming)
        body = self.rfile.read(int(self.headers["Content-Length"]))
        _Receiver.received.append((self.headers[notify.SIGNATURE_HEADER], body))
        self.send_response(_Receiver.status)
        self.end_headers()

    def log_message(self, *args):
        pass


@pytest.fixture
def receiver():
    _Receiver.received, _Receiver.status = [], 200
    server = http.server.HTTPServer(("127.0.0.1", 0), _Receiver)
    threading.Thread(target=server.serve_forever, daemon=True).start()
    yield f"http://127.0.0.1:{server.server_port}/hook", _Receiver
    server.shutdown()


def test_webhook_is_signed_and_leads_are_mailed(detector, version, users, receiver, settings):
    url, handler = receiver
    users["lead"].email = "lead@larkspur.invalid"
    users["lead"].save()
    notify.set_webhook(detector, users["lead"], url, "s3cret-s3cret-s3cret")
    result = notify.notify(version)
    assert result == {"emails": 1, "webhook": 1}
    signature_header, body = handler.received[0]
    expected = "sha256=" + hmac.new(b"s3cret-s3cret-s3cret", body, hashlib.sha256).hexdigest()
    assert signature_header == expected
    assert json.loads(body)["version"] == "1.4.0"
    assert mail.outbox[0].to == ["lead@larkspur.invalid"] and "INCOMPLETE" in mail.outbox[0].subject
    assert json.loads(body)["reasons"] == ["no predictions uploaded"]  # its current verdict


def test_a_failing_webhook_is_retried_then_reported(detector, version, users, receiver, settings):
    url, handler = receiver
    handler.status = 500
    settings.BENCHBOOK_WEBHOOK_BACKOFF_SECONDS = 0.01
    notify.set_webhook(detector, users["lead"], url, "s3cret-s3cret-s3cret")
    with pytest.raises(notify.WebhookError, match="failed after 4 attempts: HTTP 500"):
        notify.post_webhook(detector, {"event": "test"})
    assert len(handler.received) == 4
    result = notify.notify(version)  # the rest of the notification still happens
    assert "failed after 4 attempts" in result["webhook"]


def test_an_unreachable_webhook_is_reported(detector, version, users, settings):
    settings.BENCHBOOK_WEBHOOK_BACKOFF_SECONDS = 0.01
    notify.set_webhook(detector, users["lead"], "http://127.0.0.1:9/hook", "s3cret-s3cret-s3cret")
    with pytest.raises(notify.WebhookError, match="failed after 2 attempts"):
        notify.post_webhook(detector, {"event": "test"}, attempts=2)


@pytest.mark.parametrize(
    "url, secret, message",
    [
        ("ftp://example.invalid/hook", "s3cret-s3cret-s3cret", "is not an http(s) URL"),
        ("http://example.invalid/hook", "short", "at least 16 characters"),
    ],
)
def test_bad_webhook_settings_are_refused(detector, users, url, secret, message):
    with pytest.raises(ValueError, match=message.replace("(", r"\(").replace(")", r"\)")):
        notify.set_webhook(detector, users["lead"], url, secret)
    detector.refresh_from_db()
    assert detector.webhook_url == ""


def test_only_leads_set_the_webhook(detector, users):
    with pytest.raises(PermissionDenied, match="leads only"):
        notify.set_webhook(
            detector, users["engineer"], "http://example.invalid/hook", "s3cret-s3cret-s3cret"
        )


def test_leads_set_and_remove_the_webhook_on_the_criteria_page(client, detector, users):
    from django.urls import reverse

    url = reverse("webhook", args=[detector.pk])
    client.force_login(users["engineer"])
    assert (
        client.post(url, {"url": "https://ci.invalid/hook", "secret": "x" * 16}).status_code == 403
    )
    client.force_login(users["lead"])
    page = client.post(url, {"url": "https://ci.invalid/hook", "secret": "short"}, follow=True)
    assert "webhook: the webhook secret must have at least 16 characters" in page.content.decode()
    client.post(url, {"url": "https://ci.invalid/hook", "secret": "s" * 20})
    client.post(url, {"url": "https://ci.invalid/other", "secret": ""})  # keeps the secret
    detector.refresh_from_db()
    assert (detector.webhook_url, detector.webhook_secret) == ("https://ci.invalid/other", "s" * 20)
    page = client.get(reverse("criteria", args=[detector.pk])).content.decode()
    assert "https://ci.invalid/other" in page and "s" * 20 not in page
    client.post(url, {"url": "", "secret": ""})
    detector.refresh_from_db()
    assert (detector.webhook_url, detector.webhook_secret) == ("", "")


# Recorded notifications: a lost message is sent again by the sweep -------------------


@pytest.fixture
def judged_unsent(detector, version, users, receiver, split, split_truth, run_tasks, monkeypatch):
    """A judged version whose notification message the broker lost (``apply_async``
    raised): the notification is recorded, pending, never tried."""
    from releases import services
    from releases import tasks as release_tasks

    from .conftest import detections_for, upload

    url, handler = receiver
    users["lead"].email = "lead@larkspur.invalid"
    users["lead"].save()
    notify.set_webhook(detector, users["lead"], url, "s3cret-s3cret-s3cret")

    def lost(*args, **kwargs):
        raise ConnectionError("broker unreachable")

    with monkeypatch.context() as broker_down:
        broker_down.setattr(release_tasks.notify, "apply_async", lost)
        run_tasks(
            services.submit_predictions,
            version,
            split,
            upload("p.json", detections_for(split_truth)),
            users["engineer"],
        )
    return handler


def _due_now():
    from django.utils import timezone

    from releases.models import Notification

    Notification.objects.update(due_at=timezone.now())  # the grace period has passed


def test_a_lost_notification_is_delivered_by_the_sweep(judged_unsent, run_tasks):
    """The judgement's notification is recorded in its transaction; its message is
    lost, so nothing was sent. The sweep leaves it alone during the grace period (the
    message may still arrive), then sends it: the webhook gets it once, the leads one
    e-mail, and it is ``sent`` after one attempt."""
    from releases import tasks as release_tasks
    from releases.models import Judgement, Notification

    (notification,) = Notification.objects.all()
    assert notification.judgement == Judgement.objects.get() and notification.state == "pending"
    assert notification.attempts == 0 and judged_unsent.received == [] and mail.outbox == []
    assert run_tasks(release_tasks.resend_notifications.apply).result == []  # not due yet
    _due_now()
    assert run_tasks(release_tasks.resend_notifications.apply).result == [notification.pk]
    notification.refresh_from_db()
    assert (notification.state, notification.attempts, notification.emailed) == ("sent", 1, True)
    assert len(judged_unsent.received) == 1 and len(mail.outbox) == 1
    body = json.loads(judged_unsent.received[0][1])
    assert body["version"] == "1.4.0" and body["verdict"] == "pass"
    run_tasks(release_tasks.notify.apply, args=[notification.pk])  # a duplicate message
    assert run_tasks(release_tasks.resend_notifications.apply).result == []
    assert len(judged_unsent.received) == 1 and len(mail.outbox) == 1


def test_a_failing_webhook_is_tried_a_bounded_number_of_times(judged_unsent, settings):
    """Each attempt is one POST; a failed one is due again after its back-off; after
    ``BENCHBOOK_WEBHOOK_ATTEMPTS`` the notification is ``failed`` with the reason. The
    leads are e-mailed once, however many attempts the webhook takes."""
    from releases.models import Notification

    judged_unsent.status = 500
    (notification,) = Notification.objects.all()
    outcomes = []
    for _ in range(settings.BENCHBOOK_WEBHOOK_ATTEMPTS + 2):
        _due_now()
        outcomes.append(notify.deliver(notification.pk))
    notification.refresh_from_db()
    attempts = settings.BENCHBOOK_WEBHOOK_ATTEMPTS
    assert [o["state"] for o in outcomes[:attempts]] == ["pending"] * (attempts - 1) + ["failed"]
    assert outcomes[attempts:] == [None, None]  # given up: nothing more is tried
    assert (notification.state, notification.attempts) == ("failed", attempts)
    assert notification.last_error.endswith("HTTP 500") and notification.emailed
    assert len(judged_unsent.received) == attempts and len(mail.outbox) == 1


def test_an_attempt_in_progress_is_not_taken_twice(judged_unsent):
    """A notification being delivered is held until past the task's time limit: a
    duplicate message, or the sweep, does not start a second attempt meanwhile."""
    from releases.models import Notification

    (notification,) = Notification.objects.all()
    assert notify._claim(notification.pk) is not None  # an attempt starts (and hangs)
    assert notify._claim(notification.pk) is None
    assert notify.resend_due() == []
