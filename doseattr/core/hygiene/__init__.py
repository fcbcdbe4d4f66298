"""Compliance with occupational exposure limits."""
