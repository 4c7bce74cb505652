"""Client library for the veil service.

Not built yet: the client (``VeilClient`` and ``AsyncVeilClient`` on httpx)
lands with the client issue.  The package exists so the distribution layout
is fixed from the start.
"""

__all__: list[str] = []
