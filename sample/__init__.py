"""Invented demo data for triage: a seeded generator and a small committed portfolio."""
