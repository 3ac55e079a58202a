"""Revisions of the database schema, oldest first (see ``service.migrations``)."""
