"""The committed sample of real sentence embeddings (an invented scenario, for demos and tests).

*Harbourline* is a fictional community job board for a coastal region.
Each row is a member's short, template-written profile embedded with the
open all-MiniLM-L6-v2 sentence model (384 dimensions, unit length), with
the member's pronoun (``"she"``/``"he"``: the attribute to erase), an age
bracket (a second attribute) and field of work (the task).  Fields are
skewed by pronoun on purpose.  ``scripts/make_profile_sample.py`` made it.
"""

from __future__ import annotations

from dataclasses import dataclass
from importlib import resources

import numpy as np
from numpy.typing import NDArray

SAMPLE_FILE = "harbourline_profiles.npz"


@dataclass(frozen=True)
class ProfileSample:
    """The Harbourline sample: embeddings, labels and the texts they came from."""

    embedding: NDArray[np.float32]
    pronoun: NDArray[np.str_]
    age_bracket: NDArray[np.str_]
    field: NDArray[np.str_]
    text: NDArray[np.str_]


def load_harbourline_profiles() -> ProfileSample:
    """Load the committed sample (3,000 rows × 384 float32) from the installed package."""
    with (
        resources.files("veil").joinpath("data", SAMPLE_FILE).open("rb") as handle,
        np.load(handle, allow_pickle=False) as data,
    ):
        return ProfileSample(**{key: data[key] for key in ProfileSample.__dataclass_fields__})
