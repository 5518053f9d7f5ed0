"""Presentation: rich terminal tables, matplotlib figures and the self-contained
HTML report.

Imports ``runner.analysis`` and everything below it.
"""
