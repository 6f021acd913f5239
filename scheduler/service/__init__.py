"""The re-planning service (APScheduler)."""
