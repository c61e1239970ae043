"""Headless core: loading, scoring, ranking, ledger and export.

Nothing under this package may import Textual or ``triage.tui``; the command line and the
review screens both call these functions.
"""
