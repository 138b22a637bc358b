"""Track reconstruction: cleaning and two-stage moment analysis of raw events (``shared`` PHYSICS.md §2)."""

from .status import Status, explain_status

__all__ = ["Status", "explain_status"]
