"""Moved to :mod:`tracker.services.access.audit`; callers are being moved over in this change."""

from tracker.services.access.audit import record

__all__ = ["record"]
