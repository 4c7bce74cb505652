"""Which embedding model made a sample's vectors: a name and, if known, a version (``NAME`` or ``NAME@VERSION``).

A version's card records the model it was fitted on (``veil fit --embedding-model``, or the sample file's
``embedding_model`` entry), and a caller of the service may state theirs (the ``X-Veil-Embedding-Model``
header): a map fitted on one model's space moves another model's vectors to meaningless places even when the
dimensions agree, so a stated model that differs from the recorded one is refused.

Names and versions are compared exactly (``all-MiniLM-L6-v2`` is not ``all-minilm-l6-v2``); versions are
compared only when both sides state one, so ``all-MiniLM-L6-v2`` matches ``all-MiniLM-L6-v2@2.2.0``.
"""

from __future__ import annotations

import re
import zipfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from veil.errors import DataError

#: The ``.npz`` entry a sample file may state its model in: one string, ``NAME`` or ``NAME@VERSION``.
SAMPLE_MODEL_KEY = "embedding_model"
#: Longest accepted ``NAME@VERSION`` (it travels in an HTTP header).
MAX_MODEL_TEXT = 200
# Characters safe in an HTTP header and a file name, and enough for the usual model ids
# (``org/model-name``, ``v1.5``, a commit hash, ``2024-01-25``).
_PART = re.compile(r"[A-Za-z0-9][A-Za-z0-9._/:+-]*")
_FORM = (
    "NAME or NAME@VERSION, each starting with a letter or digit and holding only letters, digits and . _ / : + - "
    f"(at most {MAX_MODEL_TEXT} characters in all)"
)


@dataclass(frozen=True)
class EmbeddingModel:
    """An embedding model's name and, if stated, its version.

    Parameters
    ----------
    name : str
        The model's name, e.g. ``"sentence-transformers/all-MiniLM-L6-v2"``.
    version : str, optional
        Its version (a release, a revision, a commit); None when not stated.
    """

    name: str
    version: str | None = None

    def __post_init__(self) -> None:
        for part in (self.name, self.version):
            if part is not None and not (isinstance(part, str) and _PART.fullmatch(part)):
                raise DataError(f"an embedding model is {_FORM}; got {self.text!r}")
        if len(self.text) > MAX_MODEL_TEXT:
            raise DataError(f"an embedding model is {_FORM}; got {len(self.text)} characters")

    @classmethod
    def parse(cls, text: str) -> EmbeddingModel:
        """``NAME`` or ``NAME@VERSION`` (surrounding spaces ignored); refuses anything else, saying the form."""
        name, at, version = text.strip().partition("@")
        if at and not version:
            raise DataError(f"an embedding model is {_FORM}; got {text!r} (nothing after '@')")
        return cls(name, version if at else None)

    @property
    def text(self) -> str:
        """``NAME@VERSION``, or ``NAME`` without a version."""
        return self.name if self.version is None else f"{self.name}@{self.version}"

    def differs_from(self, other: EmbeddingModel) -> bool:
        """Whether the names differ, or both state a version and the versions differ."""
        if self.name != other.name:
            return True
        return self.version is not None and other.version is not None and self.version != other.version


def sample_model(path: str | Path) -> EmbeddingModel | None:
    """The model an ``.npz`` sample states in its :data:`SAMPLE_MODEL_KEY` entry; None for any other file or none.

    Only this entry is read (an ``.npz`` loads each array when asked for it).
    """
    path = Path(path)
    if path.suffix.lower() != ".npz" or not zipfile.is_zipfile(path):
        return None
    with np.load(path, allow_pickle=False) as stored:
        if SAMPLE_MODEL_KEY not in stored.files:
            return None
        value = stored[SAMPLE_MODEL_KEY]
    if value.dtype.kind != "U" or value.ndim != 0:
        raise DataError(f"{path}: {SAMPLE_MODEL_KEY!r} must be one string, {_FORM}; got {_shown(value)}")
    try:
        return EmbeddingModel.parse(str(value))
    except DataError as error:
        raise DataError(f"{path}: {SAMPLE_MODEL_KEY!r}: {error}") from None


def _shown(value: Any) -> str:
    return f"an array of dtype {value.dtype} and shape {value.shape}"


#: Who named the model a version records: the fit's request, or the sample file (its :data:`SAMPLE_MODEL_KEY`).
STATED_BY = ("request", "sample file")


def fitted_model(
    requested: EmbeddingModel | None, in_sample: EmbeddingModel | None
) -> tuple[EmbeddingModel, str] | None:
    """The model a fit records and who named it (one of :data:`STATED_BY`); None when neither names one.

    The request's model wins; one that differs from the sample file's is refused, naming both.
    """
    if requested is not None and in_sample is not None and requested.differs_from(in_sample):
        raise DataError(
            f"the sample file states embedding model {in_sample.text!r} ({SAMPLE_MODEL_KEY!r}), the fit names "
            f"{requested.text!r}; name the model that made these vectors"
        )
    if requested is not None:
        return requested, STATED_BY[0]
    return None if in_sample is None else (in_sample, STATED_BY[1])
