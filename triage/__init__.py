"""triage: weekly forecast review for demand planners."""

__version__ = "0.1.0"
