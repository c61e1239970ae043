"""Renderers: what the core computed, as terminal text, HTML and files.

A renderer takes the model's data (a scorecard, a ``ReportData``, review tables) and formats or
writes it; it holds no rule of its own about the data. Renderers import ``triage.core``; the core
never imports them (``tests/core/test_codebase.py``).
"""
