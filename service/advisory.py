"""The advisory notice: one wording, shown by the CLI, the API's description, the dashboard and the report."""

from __future__ import annotations

__all__ = ["ADVISORY"]

ADVISORY = ("rwls is an advisory monitoring aid, not a safety instrumented function. Follow the site's "
            "alarm philosophy, local codes and licensed engineering practice.")
