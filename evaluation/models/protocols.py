"""Custom protocols a benchmark suite may name, stored by name (append-only)."""

from django.db import models


class StoredProtocol(models.Model):
    """A custom protocol a benchmark suite may name: its definition (the engine's
    ``protocol_from_dict`` keys), kept as stored. A name always means the same
    definition (append-only: a changed protocol is stored under a new name), so an
    evaluation's ``protocol`` column stays an exact reference."""

    name = models.CharField(max_length=32, unique=True)
    definition = models.JSONField()
    sha256 = models.CharField(max_length=64, help_text="SHA-256 of the canonical definition.")
    created_by = models.CharField(max_length=150, blank=True)
    created_at = models.DateTimeField(auto_now_add=True)

    def __str__(self):
        return f"{self.name} (custom, {self.sha256[:12]})"
