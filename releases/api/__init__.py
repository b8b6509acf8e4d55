"""The REST API under /api/v1/: the same services and permissions as the pages."""
