"""The leakage and utility audit of a fitted eraser, on held-out data."""

from veil.audit.report import AuditReport, Leakage, ProbeScore, RegressionScore, Retrieval, Utility
from veil.audit.run import audit, fit_and_audit

__all__ = ["AuditReport", "Leakage", "ProbeScore", "RegressionScore", "Retrieval", "Utility", "audit", "fit_and_audit"]
