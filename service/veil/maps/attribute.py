"""Checks and encodings of the attribute ``z`` shared by every eraser and the audit."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray


@dataclass(frozen=True)
class EncodedAttribute:
    """An attribute as the moment statistics see it.

    Attributes
    ----------
    labels : ndarray of shape (m,) or None
        The sorted class labels when the attribute is categorical (1-D input);
        column ``j`` of ``matrix`` is then the indicator of ``labels[j]``.
        ``None`` for a numeric 2-D attribute (one-hot blocks, or continuous).
    matrix : ndarray of shape (n, m), float64
    """

    labels: NDArray[np.generic] | None
    matrix: NDArray[np.float64]

    @property
    def is_categorical(self) -> bool:
        return self.labels is not None

    @property
    def codes(self) -> NDArray[np.intp]:
        """Class index of each row (categorical attributes), shape (n,)."""
        if self.labels is None:
            raise ValueError("class codes need a categorical (1-D) attribute")
        return np.asarray(np.argmax(self.matrix, axis=1), dtype=np.intp)


def _as_label_array(z: NDArray[np.generic]) -> NDArray[np.generic]:
    if z.dtype == object:
        values = list(z)
        if all(isinstance(v, str) for v in values):
            return np.asarray(values, dtype=str)
        if all(isinstance(v, (int, np.integer, bool, np.bool_)) for v in values):
            return np.asarray(values, dtype=np.int64)
        raise ValueError("attribute labels must be all strings or all integers; got a mix or missing values")
    if z.dtype.kind == "f" and not np.all(np.isfinite(z)):
        raise ValueError("attribute labels contain NaN or infinity")
    if z.dtype.kind not in "biufUS":
        raise ValueError(f"attribute labels must be integers or strings, not {z.dtype}")
    return z


def encode_attribute(z: object, n_rows: int, *, require_categorical: bool = False) -> EncodedAttribute:
    """Validate ``z`` against ``n_rows`` rows of ``X`` and encode it.

    Parameters
    ----------
    z : array-like of shape (n,) or (n, m)
        1-D: class labels (integers or strings). 2-D: a numeric attribute
        matrix (one-hot blocks for several attributes, or continuous columns).
    n_rows : int
        Number of rows of ``X``.
    require_categorical : bool, default=False
        Refuse 2-D attributes (for erasers that train classifiers).

    Returns
    -------
    EncodedAttribute
    """
    if z is None:
        # The parenthesis is scikit-learn's wording, which its tooling looks for.
        raise ValueError("this eraser needs the attribute z (requires y to be passed, but the target y is None)")
    array = np.asarray(z)
    if array.ndim == 0 or array.ndim > 2:
        raise ValueError(f"z must be 1-D labels or a 2-D attribute matrix; got {array.ndim}-D")
    if array.shape[0] != n_rows:
        raise ValueError(f"X has {n_rows} rows but z has {array.shape[0]}; they must match")
    if array.ndim == 2 and array.shape[1] == 1 and require_categorical:
        array = array[:, 0]
    if array.ndim == 1:
        labels, inverse = np.unique(_as_label_array(array), return_inverse=True)
        matrix = np.zeros((n_rows, labels.size))
        matrix[np.arange(n_rows), inverse] = 1.0
        return EncodedAttribute(labels=labels, matrix=matrix)
    if require_categorical:
        raise ValueError("this eraser needs 1-D class labels z, not a 2-D attribute matrix")
    if array.dtype.kind not in "biuf":
        raise ValueError(f"a 2-D attribute must be numeric, not {array.dtype}")
    matrix = array.astype(np.float64)
    if not np.all(np.isfinite(matrix)):
        raise ValueError("the attribute matrix z contains NaN or infinity")
    if matrix.shape[1] == 0:
        raise ValueError("the attribute matrix z has no columns")
    return EncodedAttribute(labels=None, matrix=matrix)


def check_enough_rows(n_rows: int, labels: NDArray[np.generic] | None) -> None:
    """Refuse fits that cannot estimate what the erasers need.

    A categorical attribute needs two classes or more, and more rows than
    classes (otherwise every class mean is a single point and no within-class
    spread is left to estimate); a numeric one needs two rows or more.
    """
    if labels is None:
        if n_rows < 2:
            raise ValueError(f"need at least 2 rows to fit, got {n_rows}")
        return
    if labels.size < 2:
        raise ValueError(
            f"z has only one class ({labels[0]!r}); erasure needs two classes or more" if labels.size else "z is empty"
        )
    if n_rows <= labels.size:
        raise ValueError(f"need more rows than classes: got {n_rows} rows for {labels.size} classes")


def check_positive_int(name: str, value: object) -> None:
    """Refuse an estimator parameter that must be a positive integer."""
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise ValueError(f"{name} must be a positive integer, got {value!r}")
