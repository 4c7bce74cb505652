"""The maps and their math: the map kinds an artifact can hold, the statistics they are fitted from.

Holds the affine low-rank map ``x' = x - U Vᵀ (x - μ)`` and the protocol of
every map kind (:mod:`veil.maps.kinds`), mergeable float64 moments, the
attribute's encoding, linear algebra with rank cuts that round-off cannot
move, and :class:`~veil.maps.artifact.MapArtifact`, what a fitted eraser
exports.

May import: ``veil.errors`` and ``veil.samples``.  The erasers, the audit,
the registry and the service build on it; it imports none of them.
"""
