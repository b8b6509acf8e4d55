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
