"""Textual review screens; they call triage.core and compute nothing themselves."""
