"""Telling people about a judgement: e-mail to the team's leads, and a signed webhook."""

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


def deliver(version, attempt=1):
    """One run of the notification task: e-mail the leads (first run only) and try the
    webhook once. Returns ``{"emails", "webhook", "retry_in"}``: ``retry_in`` is the
    countdown for the next attempt, or None when delivered, not configured or given up
    (then logged)."""
    body = payload(version)
    sent = email_leads(version, body) if attempt == 1 else 0
    if not version.detector.webhook_url:
        return {"emails": sent, "webhook": None, "retry_in": None}
    try:
        post_once(version.detector, body)
        return {"emails": sent, "webhook": attempt, "retry_in": None}
    except WebhookError as e:
        if attempt < settings.BENCHBOOK_WEBHOOK_ATTEMPTS:
            log.warning("%s (attempt %d); trying again later", e, attempt)
            return {"emails": sent, "webhook": str(e), "retry_in": backoff(attempt)}
        log.error("%s; gave up after %d attempts", e, attempt)
        return {"emails": sent, "webhook": str(e), "retry_in": None}


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
