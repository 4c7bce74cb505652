"""Errors about the user's input data, shared by the fitting job, offline apply and the CLI."""

from __future__ import annotations


class DataError(ValueError):
    """Input data that cannot be used as it is; the message names the problem and where it is."""
