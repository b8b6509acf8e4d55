"""Teams, their members' roles and their members' API tokens."""

from django.conf import settings
from django.db import models


class Team(models.Model):
    name = models.CharField(max_length=100, unique=True)
    slug = models.SlugField(max_length=100, unique=True)

    def __str__(self):
        return self.name


class Membership(models.Model):
    class Role(models.TextChoices):
        ENGINEER = "engineer"
        LEAD = "lead"
        REVIEWER = "reviewer"

    team = models.ForeignKey(Team, on_delete=models.CASCADE, related_name="memberships")
    user = models.ForeignKey(
        settings.AUTH_USER_MODEL, on_delete=models.CASCADE, related_name="memberships"
    )
    role = models.CharField(max_length=8, choices=Role.choices)

    class Meta:
        constraints = [models.UniqueConstraint(fields=["team", "user"], name="one_role_per_team")]

    def __str__(self):
        return f"{self.user} ({self.role}) in {self.team}"


class ApiToken(models.Model):
    """A personal API token. Only its SHA-256 is kept; the token is shown once.

    Tokens are 256 random bits, so a plain hash (no salt, no slow KDF) is enough to
    make a leaked table useless while keeping lookup one indexed query (common practice).
    """

    user = models.ForeignKey(
        settings.AUTH_USER_MODEL, on_delete=models.CASCADE, related_name="api_tokens"
    )
    name = models.CharField(max_length=100, help_text="What the token is for, e.g. the CI job.")
    prefix = models.CharField(max_length=12, help_text="The token's first characters, to tell.")
    digest = models.CharField(max_length=64, unique=True)
    created_at = models.DateTimeField(auto_now_add=True)
    last_used_at = models.DateTimeField(null=True, blank=True)
    revoked_at = models.DateTimeField(null=True, blank=True)

    class Meta:
        ordering = ["-created_at"]

    def __str__(self):
        return f"{self.prefix}… ({self.name}) of {self.user}"

    @property
    def active(self):
        return self.revoked_at is None
