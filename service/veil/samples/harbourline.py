"""The committed samples of real sentence embeddings (an invented scenario, for demos and tests).

*Harbourline* is a fictional community job board for a coastal region.
Each row is a member's short, template-written profile embedded with the
open all-MiniLM-L6-v2 sentence model (384 dimensions, unit length), with
the member's pronoun (``"she"``/``"he"``: the attribute to erase), an age
bracket (a second attribute) and field of work (the task).  Fields are
skewed by pronoun on purpose.  ``scripts/make_profile_sample.py`` made both
samples: the small one (3,000 rows, float32) that the demo uses, and a large
one (24,000 rows, every text distinct, a wider vocabulary) stored as float16
and widened back to float32 on load, for effects that sampling error hides
at a few thousand rows.  The committed files do not name the model in an
``embedding_model`` entry (they predate it), so a version fitted on them records
an embedding model only when ``veil fit --embedding-model`` names one; the
script writes the entry when it regenerates them.
"""

from __future__ import annotations

from dataclasses import dataclass
from importlib import resources
from typing import Literal

import numpy as np
from numpy.typing import NDArray

SAMPLE_FILE = "harbourline_profiles.npz"
LARGE_SAMPLE_FILE = "harbourline_profiles_large.npz"
SAMPLE_FILES = {"small": SAMPLE_FILE, "large": LARGE_SAMPLE_FILE}


@dataclass(frozen=True)
class ProfileSample:
    """The Harbourline sample: embeddings, labels and the texts they came from."""

    embedding: NDArray[np.float32]
    pronoun: NDArray[np.str_]
    age_bracket: NDArray[np.str_]
    field: NDArray[np.str_]
    text: NDArray[np.str_]


def load_harbourline_profiles(size: Literal["small", "large"] = "small") -> ProfileSample:
    """Load a committed sample from the installed package, embeddings as float32.

    Parameters
    ----------
    size : {"small", "large"}
        ``"small"``: 3,000 rows × 384, stored as float32.  ``"large"``: 24,000
        rows × 384, stored as float16 (each value within half a float16 step
        of the model's float32 output) and widened exactly to float32 here.
    """
    if size not in SAMPLE_FILES:
        raise ValueError(f"size must be one of {sorted(SAMPLE_FILES)}, got {size!r}")
    with (
        resources.files("veil").joinpath("data", SAMPLE_FILES[size]).open("rb") as handle,
        np.load(handle, allow_pickle=False) as data,
    ):
        columns = {key: data[key] for key in ProfileSample.__dataclass_fields__}
    columns["embedding"] = columns["embedding"].astype(np.float32, copy=False)
    return ProfileSample(**columns)
