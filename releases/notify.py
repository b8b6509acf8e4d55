"""Telling people about a judgement: e-mail to the team's leads, and a signed webhook.

Every judgement gets a ``Notification`` row in its own transaction (``record``); the
task ``tasks.notify`` delivers it (``deliver``), one webhook attempt per run, and the
beat sweep (``resend_due``) sends again whatever is still pending past its time — a
message the broker lost or a worker killed mid-delivery — until
``BENCHBOOK_WEBHOOK_ATTEMPTS`` attempts were made; then it is ``failed`` with the reason.
"""

import datetime
import hashlib
import hmac
import json
import logging
import time
import urllib.error
import urllib.request

from django.conf import settings
from django.core.exceptions import PermissionDenied, ValidationError
from django.core.mail import send_mail
from django.core.validators import URLValidator
from django.db.models import F, Q
from django.utils import timezone

from . import selectors
from .models import Membership, Outcome

log = logging.getLogger(__name__)
SIGNATURE_HEADER = "X-Benchbook-Signature"


class WebhookError(Exception):
    """The webhook could not be delivered after every retry."""


def signature(secret, body):
    """``sha256=<hex HMAC-SHA256 of the body under the secret>`` (RFC 2104)."""
    return "sha256=" + hmac.new(secret.encode(), body, hashlib.sha256).hexdigest()


def set_webhook(detector, user, url, secret):
    """Leads point a detector's judgements at a URL (empty: none); both are checked."""
    if selectors.role_in(user, detector.team) != Membership.Role.LEAD:
        raise PermissionDenied(f"{user} may not set the webhook of {detector}: leads only")
    if not url:  # no URL: judgements are only e-mailed
        detector.webhook_url, detector.webhook_secret = "", ""
        detector.save(update_fields=["webhook_url", "webhook_secret"])
        return
    try:
        URLValidator(schemes=["http", "https"])(url)
    except ValidationError:
        raise ValueError(f"webhook URL {url!r} is not an http(s) URL") from None
    if len(secret) < 16:
        raise ValueError("the webhook secret must have at least 16 characters")
    detector.webhook_url, detector.webhook_secret = url, secret
    detector.save(update_fields=["webhook_url", "webhook_secret"])


def payload(version):
    """What the team is told, read when the message is sent: the version's current
    verdict (``verdicts.verdict_of``), so a delayed message never reports a judgement
    that a criteria, suite or baseline change has made stale (it says ``judging``)."""
    from .verdicts import verdict_of

    verdict = verdict_of(version)
    judgement = verdict.judgement
    outcomes = Outcome.objects.filter(judgement=judgement, judgement__isnull=False)
    outcomes = outcomes.select_related("split")
    counts = {status: 0 for status in Outcome.Status.values}
    for o in outcomes:
        counts[o.status] += 1
    return {
        "event": "version.judged",
        "detector": version.detector.name,
        "version": version.label,
        "verdict": verdict.state,
        "reasons": verdict.reasons,
        "regression": counts["fail"] > 0,
        "counts": counts,
        "failures": [
            {
                "rule": o.rule_index + 1,
                "split": str(o.split),
                "class": o.class_name,
                "detail": o.detail,
            }
            for o in outcomes
            if o.status == "fail"
        ],
    }


def email_leads(version, body):
    leads = [
        m.user.email
        for m in Membership.objects.filter(
            team=version.detector.team, role=Membership.Role.LEAD
        ).select_related("user")
        if m.user.email
    ]
    if not leads:
        return 0
    verdict = {"pass": "pass, no regression", "regression": "REGRESSION"}.get(
        body.get("verdict"), (body.get("verdict") or "not judged").upper()
    )
    lines = [f"{version} was judged against its release criteria: {verdict}."]
    lines += [f"- {reason}" for reason in body.get("reasons", [])]
    return send_mail(
        f"[Benchbook] {version}: {verdict}", "\n".join(lines), settings.DEFAULT_FROM_EMAIL, leads
    )


def post_once(detector, body):
    """One signed POST of the JSON body, waiting at most BENCHBOOK_WEBHOOK_TIMEOUT_SECONDS
    per network operation; WebhookError with the reason if it was not accepted (2xx)."""
    data = json.dumps(body, sort_keys=True).encode()
    request = urllib.request.Request(
        detector.webhook_url,
        data=data,
        method="POST",
        headers={
            "Content-Type": "application/json",
            SIGNATURE_HEADER: signature(detector.webhook_secret, data),
        },
    )
    try:
        timeout = settings.BENCHBOOK_WEBHOOK_TIMEOUT_SECONDS
        with urllib.request.urlopen(request, timeout=timeout) as response:
            if 200 <= response.status < 300:
                return
            reason = f"HTTP {response.status}"
    except urllib.error.HTTPError as e:
        reason = f"HTTP {e.code}"
    except (urllib.error.URLError, OSError) as e:
        reason = str(getattr(e, "reason", e))
    raise WebhookError(f"webhook {detector.webhook_url}: {reason}")


def backoff(attempt):
    """Seconds before webhook attempt ``attempt + 1``: doubling from the base delay."""
    return settings.BENCHBOOK_WEBHOOK_BACKOFF_SECONDS * 2 ** (attempt - 1)


def post_webhook(detector, body, *, attempts=None, delay=None):
    """POST the JSON body, signed; retried here with exponential back-off, then
    WebhookError. (The notification task does not wait here: it queues each retry.)"""
    attempts = attempts or settings.BENCHBOOK_WEBHOOK_ATTEMPTS
    delay = settings.BENCHBOOK_WEBHOOK_BACKOFF_SECONDS if delay is None else delay
    last = None
    for attempt in range(attempts):
        try:
            post_once(detector, body)
            return attempt + 1
        except WebhookError as e:
            last = str(e).rpartition(": ")[2]
        if attempt + 1 < attempts:
            time.sleep(delay * 2**attempt)
    raise WebhookError(f"webhook {detector.webhook_url} failed after {attempts} attempts: {last}")


def _seconds(value):
    return datetime.timedelta(seconds=value)


def record(version, judgement):
    """Inside the judgement's transaction: the notification to deliver. Its first
    message is queued on commit; if that message is lost, the sweep sends it again
    once ``BENCHBOOK_NOTIFY_GRACE_SECONDS`` have passed."""
    from .models import Notification

    return Notification.objects.create(
        version=version,
        judgement=judgement,
        due_at=timezone.now() + _seconds(settings.BENCHBOOK_NOTIFY_GRACE_SECONDS),
    )


def _claim(notification_id):
    """Take one attempt (atomically): a pending notification that was never tried, or
    whose next attempt is due. The attempt holds it for the task's time limit, so a
    duplicate message finds it not due and drops out."""
    from .models import Notification

    now = timezone.now()
    hold = 4 * settings.BENCHBOOK_WEBHOOK_TIMEOUT_SECONDS + 30  # past the task's time limit
    claimed = (
        Notification.objects.filter(pk=notification_id, state=Notification.State.PENDING)
        .filter(Q(attempts=0) | Q(due_at__lte=now + _seconds(1)))
        .update(attempts=F("attempts") + 1, due_at=now + _seconds(hold))
    )
    if not claimed:
        return None
    return Notification.objects.select_related("version__detector", "judgement").get(
        pk=notification_id
    )


def deliver(notification_id):
    """One attempt at a notification (the task's body): e-mail the leads (once), then
    the webhook once. Returns ``{"state", "attempt", "retry_in"}`` (``retry_in``: the
    countdown for the next attempt), or None when there was nothing to do (delivered,
    given up, or another attempt holds it)."""
    from .models import Notification

    notification = _claim(notification_id)
    if notification is None:
        return None
    version, attempt = notification.version, notification.attempts
    rows = Notification.objects.filter(pk=notification.pk)
    try:
        body = payload(version)  # the current verdict, read now (see payload)
        if not notification.emailed:
            email_leads(version, body)
            rows.update(emailed=True)
        if version.detector.webhook_url:
            post_once(version.detector, body)
    except Exception as e:  # noqa: BLE001 - any failure is this attempt's reason
        error = str(e) if isinstance(e, WebhookError) else f"{type(e).__name__}: {e}"
        if attempt < settings.BENCHBOOK_WEBHOOK_ATTEMPTS:
            log.warning(
                "notification %s: %s (attempt %d); trying again", notification.pk, error, attempt
            )
            retry_in = backoff(attempt)
            rows.update(last_error=error, due_at=timezone.now() + _seconds(retry_in))
            return {"state": "pending", "attempt": attempt, "retry_in": retry_in}
        log.error("notification %s: %s; gave up after %d attempts", notification.pk, error, attempt)
        rows.update(state=Notification.State.FAILED, last_error=error, finished_at=timezone.now())
        return {"state": "failed", "attempt": attempt, "retry_in": None}
    rows.update(state=Notification.State.SENT, finished_at=timezone.now())
    return {"state": "sent", "attempt": attempt, "retry_in": None}


def resend_due():
    """The beat sweep: ids of pending notifications whose next attempt is due (their
    message was lost, or their worker died); the caller queues them again."""
    from .models import Notification

    return list(
        Notification.objects.filter(
            state=Notification.State.PENDING, due_at__lte=timezone.now()
        ).values_list("pk", flat=True)
    )


def notify(version):
    """E-mail the leads and call the webhook, retrying here; a failing webhook is
    logged, not fatal. For scripts and tests: judging queues ``tasks.notify``."""
    body = payload(version)
    sent = email_leads(version, body)
    delivered = None
    if version.detector.webhook_url:
        try:
            delivered = post_webhook(version.detector, body)
        except WebhookError as e:
            log.error("%s", e)
            delivered = str(e)
    return {"emails": sent, "webhook": delivered}
