"""Reliability and security checks of veil: load, rollback under load, faults, crash loops, bad input, fuzzing.

``python -m reliability.run`` (``make reliability``) runs them all at full
size and prints one table; ``tests/test_reliability.py`` runs each at a small
size inside ``make test``.
"""
