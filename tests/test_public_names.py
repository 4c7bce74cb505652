"""Public names: estimators named after their method, and no class named ``<Something>Eraser``."""

from __future__ import annotations

import ast
from pathlib import Path

import veil
import veil.erasers

ROOT = Path(__file__).resolve().parents[1]


def test_estimators_are_named_after_their_method() -> None:
    # scikit-learn's habit for estimators named after a method (PCA, NMF): the method's own name.
    estimators = (veil.LEACE, veil.INLP, veil.RLACE, veil.MeanProjection, veil.GaussianTransport)
    assert {cls.__name__ for cls in estimators} == {"LEACE", "INLP", "RLACE", "MeanProjection", "GaussianTransport"}
    assert {cls.method for cls in estimators} == {"leace", "inlp", "rlace", "meanproj", "transport"}


def test_every_public_name_is_at_the_top_level() -> None:
    from veil.erasers.transport import GaussianTransport
    from veil.fitting.job import fit_version
    from veil.fitting.request import FitRequest

    missing = [name for name in veil.__all__ if not hasattr(veil, name)]
    assert missing == []
    assert set(veil.__all__) <= set(dir(veil))
    assert (veil.GaussianTransport, veil.fit_version, veil.FitRequest) == (GaussianTransport, fit_version, FitRequest)


def test_no_class_and_no_alias_is_named_eraser() -> None:
    offenders = []
    for path in sorted((ROOT / "service").rglob("*.py")) + sorted((ROOT / "client").rglob("*.py")):
        for node in ast.walk(ast.parse(path.read_text(), filename=str(path))):
            if isinstance(node, ast.ClassDef) and node.name.endswith("Eraser"):
                offenders.append(f"{path.relative_to(ROOT)}:{node.lineno} class {node.name}")
    offenders += [f"veil.{name}" for name in dir(veil) if name.endswith("Eraser")]
    offenders += [f"veil.erasers.{name}" for name in dir(veil.erasers) if name.endswith("Eraser")]
    assert offenders == []
