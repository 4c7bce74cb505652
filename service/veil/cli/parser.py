"""The ``veil`` command line: arguments only; each subcommand names the function in :mod:`veil.cli.commands` it runs."""

from __future__ import annotations

import argparse
import os
from collections.abc import Callable
from typing import Any, NoReturn

from veil.checks.verdict import THREATS
from veil.defaults import (
    APPLY_CHUNK_ROWS,
    AUDIT_ROWS,
    EMBEDDINGS_KEY,
    ENGINES,
    FEW_CLASS_ROWS,
    FIT_SAMPLE_ROWS,
    INDEX_FACTORY,
    LIVE_PROBE_DRAWS,
    METHOD_NAMES,
    MIN_CLASS_ROWS,
    STREAM_CHUNK_ROWS,
)
from veil.registry import DEFAULT_ALIAS

DEFAULT_REGISTRY = "./veil-registry"


def method_options_help() -> str:
    """The epilog of ``veil fit --help``: every method's options and their defaults, read from the estimators."""
    from veil.fitting.methods import method_parameters  # imports scikit-learn: only when this help is shown

    lines = ["method options (--option KEY=VALUE, repeatable):"]
    for method in METHOD_NAMES:
        options = ", ".join(f"{key}={value!r}" for key, value in sorted(method_parameters(method).items()))
        lines.append(f"  {method}: {options or '(none)'}")
    return "\n".join(lines)


class VeilParser(argparse.ArgumentParser):
    """argparse with one-line errors, options that refuse to be given twice, and an epilog made on demand."""

    def __init__(self, *args: Any, epilog_factory: Callable[[], str] | None = None, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self.epilog_factory = epilog_factory
        self.register("action", None, StoreOnce)
        self.register("action", "store", StoreOnce)

    def format_help(self) -> str:
        if self.epilog_factory is not None:
            self.epilog = self.epilog_factory()
        return super().format_help()

    def error(self, message: str) -> NoReturn:
        # One line, like every other refusal of the command (the usage is one `--help` away).
        self.exit(2, f"{self.prog}: {message} (see {self.prog} --help)\n")


#: Namespace attribute holding the options :class:`StoreOnce` has seen (removed after parsing).
GIVEN = "_given_once"


class StoreOnce(argparse.Action):
    """Store an option's value, refusing the option a second time rather than silently keeping the last."""

    def __call__(
        self,
        parser: argparse.ArgumentParser,
        namespace: argparse.Namespace,
        values: str | Any,
        option_string: str | None = None,
    ) -> None:
        given: set[str] = vars(namespace).setdefault(GIVEN, set())
        if self.dest in given:
            first = getattr(namespace, self.dest)
            parser.error(
                f"{option_string or self.dest} was given twice ({first!r}, then {values!r}); it takes one value"
            )
        given.add(self.dest)
        setattr(namespace, self.dest, values)


def parse_arguments(argv: list[str] | None) -> argparse.Namespace:
    """``argv`` (``sys.argv[1:]`` if None) parsed by :func:`build_parser`; exits 2 with one line on bad usage."""
    args = build_parser().parse_args(argv)
    vars(args).pop(GIVEN, None)
    return args


def _common_options() -> VeilParser:
    """Options every subcommand takes, after its name: ``veil versions NAME --registry R``."""
    common = VeilParser(add_help=False)
    common.add_argument(
        "--registry",
        default=os.environ.get("VEIL_REGISTRY", DEFAULT_REGISTRY),
        help="registry directory or fsspec URL (default: $VEIL_REGISTRY, else ./veil-registry)",
    )
    common.add_argument(
        "--progress",
        choices=("auto", "always", "never"),
        default="auto",
        help="progress bars on stderr: when stderr is a terminal (auto), always, or never",
    )
    return common


def _sample_options(command: argparse.ArgumentParser) -> None:
    """The options that name a labelled sample, the same for ``veil fit`` and ``veil audit``."""
    command.add_argument(
        "--data",
        required=True,
        help="labelled sample: .npz, .npy (with --labels), .parquet, or a folder of .npy shards",
    )
    command.add_argument(
        "--attribute",
        required=True,
        action="append",
        help="key or column of a protected attribute (repeatable: one eraser guards them all)",
    )
    command.add_argument(
        "--continuous",
        action="append",
        default=[],
        metavar="NAME",
        help="treat attribute NAME as continuous (age in years, a score; repeatable); every other is categorical",
    )
    command.add_argument(
        "--merge-classes",
        action="append",
        default=[],
        metavar="ATTRIBUTE:CLASS,CLASS=NEW",
        help="merge rare classes of an attribute into one (repeatable); a class needs at least "
        f"{MIN_CLASS_ROWS} fitting rows, and fewer than {FEW_CLASS_ROWS} get a note on the card",
    )
    command.add_argument(
        "--incomplete-labels",
        action="store_true",
        help="with several attributes, keep rows that lack some of them: each attribute's statistics come from the "
        "rows that carry it (the card counts them); a row lacking every attribute is refused or dropped as usual",
    )
    command.add_argument(
        "--joint",
        action="store_true",
        help="also guard the intersection of the categorical attributes (their joint classes): guarding each "
        "one alone leaves their combination readable",
    )
    command.add_argument("--task", help="key or column of a task label, for utility figures")
    command.add_argument("--labels", help="labels for .npy input: a .npy (the attribute) or a .csv with a header")
    command.add_argument(
        "--drop-missing",
        action="store_true",
        help="drop rows whose attribute, task or context (--given) label is missing (blank, NA, NaN, null) "
        "instead of refusing the sample; the card records how many",
    )
    command.add_argument(
        "--embeddings", default=EMBEDDINGS_KEY, help="key (.npz) or column (.parquet) of the embeddings"
    )
    command.add_argument(
        "--stream",
        action="store_true",
        help="read the sample in chunks with bounded memory (always on for a folder of .npy shards)",
    )
    command.add_argument("--chunk-rows", type=int, default=STREAM_CHUNK_ROWS, help="rows per chunk when streaming")


def _thorough_option(command: argparse.ArgumentParser) -> None:
    """``--thorough``: the independence tests' thorough setting, the same for ``veil fit`` and ``veil audit``."""
    command.add_argument(
        "--thorough",
        action="store_true",
        help="independence tests with 1000 permutations (200 by default) and their power on a finer grid with "
        "more draws, the strongest reader's test included (refitted on every draw); minutes rather than seconds "
        "(docs/independence.md)",
    )


def _probes_option(command: argparse.ArgumentParser) -> None:
    """``--probes``: which probes an audit runs, the same for ``veil fit`` and ``veil audit``."""
    command.add_argument(
        "--probes",
        choices=("all", "linear"),
        default="all",
        help="audit with every probe (linear, quadratic, RBF kernel, boosted trees, MLP), or the linear one only",
    )


def _fail_on_option(command: argparse.ArgumentParser) -> None:
    """``--fail-on``: the verdict at which ``fit``, ``audit`` and ``patrol`` exit 3, for a CI job to gate on."""
    command.add_argument(
        "--fail-on",
        choices=("warn", "alert"),
        help="exit 3 when the verdict reaches this level (what was fitted, audited or checked is stored all the same)",
    )


def _force_option(command: argparse.ArgumentParser) -> None:
    """``--force``: move an alias onto a version whose verdict is alert, for ``promote`` and ``fit --alias``."""
    command.add_argument(
        "--force",
        action="store_true",
        help="move the alias even if the version's verdict is alert (needs --reason; the history records both)",
    )


def _band(text: str) -> tuple[str, tuple[float, float]]:
    """``FIGURE=WARN,ALERT`` as ``(figure, (warn, alert))``."""
    figure, _, levels = text.partition("=")
    parts = levels.split(",")
    try:
        warn, alert = (float(part) for part in parts)
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"{text!r} does not read as FIGURE=WARN,ALERT (e.g. strongest_gap=0.05,0.1)"
        ) from None
    return figure.strip().replace("-", "_"), (warn, alert)


def build_parser() -> VeilParser:
    parser = VeilParser(
        prog="veil",
        description="Fit, store, inspect, promote and apply erasers that keep a protected attribute out of embeddings.",
    )
    common = [_common_options()]
    commands = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    fit = commands.add_parser(
        "fit",
        parents=common,
        help="fit an eraser on a labelled sample, audit it on held-out rows, store it as a new version",
        epilog_factory=method_options_help,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    _sample_options(fit)
    fit.add_argument("--method", required=True, choices=sorted(METHOD_NAMES))
    fit.add_argument("--option", action="append", default=[], metavar="KEY=VALUE", help="a method option")
    fit.add_argument("--name", required=True, help="the eraser's name in the registry, e.g. profiles-minilm")
    fit.add_argument(
        "--alias",
        help="point this alias (e.g. live) at the new version; refused (the version stored, exit 2) when its "
        "verdict is alert, unless --force",
    )
    fit.add_argument("--reason", default="", help="recorded in the history when --alias moves")
    fit.add_argument(
        "--embedding-model",
        metavar="NAME[@VERSION]",
        help="the embedding model that made the sample's vectors, e.g. sentence-transformers/all-MiniLM-L6-v2@2.2.0: "
        "the card records it with the dimension, and the service refuses a caller who states another model "
        "(header X-Veil-Embedding-Model); default: the model an .npz states in its 'embedding_model' entry, if any, "
        "else none is recorded and any caller is accepted",
    )
    _force_option(fit)
    fit.add_argument(
        "--claim",
        action="append",
        choices=tuple(THREATS),
        metavar="THREAT",
        help="a threat the version claims to guard, judged by the verdict's headline (repeatable; replaces the "
        "method's own claim: linear, with --given also context-linear); the others are measured and shown as not "
        f"claimed. Threats: {', '.join(f'{name} ({label})' for name, (label, _) in THREATS.items())}",
    )
    fit.add_argument(
        "--live-draws",
        type=int,
        default=LIVE_PROBE_DRAWS,
        metavar="N",
        help="no-drift live samples drawn from the held-out rows per size for each probe figure, to calibrate the "
        f"live checks' levels on the version's own noise (default {LIVE_PROBE_DRAWS}; 0: none, the live checks "
        "keep the fixed levels)",
    )
    fit.add_argument("--holdout", type=float, default=0.2, help="share of rows held out for the audit (default 0.2)")
    fit.add_argument("--seed", type=int, default=0, help="seeds the split, probes and randomised methods")
    fit.add_argument("--normalize", action="store_true", help="re-normalise served vectors to unit length")
    fit.add_argument(
        "--given",
        metavar="COLUMN",
        action="append",
        help="a categorical context (a field, a query's category) to guard the attributes within: the class means "
        "coincide within every value of COLUMN on the fitting rows (leace, meanproj; categorical attributes; "
        "transport, one column, carries the classes onto one Gaussian within every value and infers a row's value "
        "when serving); repeat it for several columns, each guarded on its own (not their combinations: for those, "
        "give one column holding the combined value); a missing value is refused or dropped like a missing label",
    )
    fit.add_argument(
        "--group",
        metavar="COLUMN",
        help="a column naming each row's group (an author, an account, a first name, a site), read as --given reads "
        "its column: whole groups are held out, every probe's folds keep each group in one fold, and the audit "
        "sets the linear probe on ordinary folds, on group folds and as a transfer probe (trained on the cleaned "
        "fitting rows) side by side; the linear threat is judged on the worst of them",
    )
    fit.add_argument(
        "--pool-small-values",
        action="store_true",
        help=f"with --given, pool the values of a column that have a class of fewer than {MIN_CLASS_ROWS} fitting "
        "rows into one group (its guarantee holds for their rows together; the card lists them) instead of "
        "refusing them",
    )
    fit.add_argument(
        "--within-only",
        action="store_true",
        help="with --given, guard within the context's values only, not the population as a whole: what the "
        "context itself says about the attribute (a field skewed by it) then stays readable",
    )
    _probes_option(fit)
    _thorough_option(fit)
    _fail_on_option(fit)
    fit.add_argument(
        "--rows-curve",
        choices=("auto", "always", "never"),
        default="auto",
        help="refit the method on 1/8, 1/4 and 1/2 of the fitting rows to project the rows that bring the held-out "
        "linear leakage under the linear threat's warn level: auto for leace, meanproj and rlace (quick "
        "refits), always for every method (inlp and transport too), never to skip it",
    )
    fit.add_argument(
        "--sweep",
        nargs="?",
        const="",
        metavar="VALUES",
        help="also fit the method at several strengths and measure each point on the held-out rows (the card "
        "and the report hold the curves); VALUES such as 8,16,64,all replace the method's grid",
    )
    fit.add_argument(
        "--target",
        action="append",
        default=[],
        metavar="EXPR",
        help="store the sweep's point of least distortion that meets every target, e.g. "
        "'nn-attribute <= base + 0.05' or 'task >= raw - 0.02' (repeatable; implies --sweep)",
    )
    fit.add_argument(
        "--audit-rows",
        type=int,
        default=AUDIT_ROWS,
        help="held-out rows audited when streaming (a hash sample)",
    )
    fit.add_argument(
        "--fit-sample-rows",
        type=int,
        default=FIT_SAMPLE_ROWS,
        help="when streaming, INLP logistic/svm and R-LACE fit on a hash sample of this many rows",
    )
    fit.add_argument(
        "--engine",
        choices=ENGINES,
        default="local",
        help="where the streaming pass runs: this process, or dask.distributed workers (implies --stream)",
    )
    fit.add_argument("--scheduler", help="address of a running Dask scheduler (default: start a local cluster)")
    fit.add_argument("--dask-workers", type=int, default=2, help="worker processes of the local Dask cluster")
    fit.add_argument(
        "--audit-threshold",
        action="append",
        default=[],
        type=_band,
        metavar="FIGURE=WARN,ALERT",
        help="levels the verdict of this version's audits is judged by, e.g. strongest_gap=0.05,0.1 (repeatable; "
        "figures: linear_gap, strongest_gap, neighbour_excess, task_loss, and within a context "
        "context_linear_gap, context_strongest_gap, context_neighbour_excess)",
    )
    fit.set_defaults(handler="fit")

    audit = commands.add_parser(
        "audit",
        parents=common,
        help="audit a stored version on a fresh labelled sample and record the result beside it",
    )
    audit.add_argument("name")
    audit.add_argument("version", help="a version id, its sequence number (3 or v3), or an alias")
    _sample_options(audit)
    _probes_option(audit)
    _thorough_option(audit)
    _fail_on_option(audit)
    audit.add_argument("--seed", type=int, default=0, help="seeds the folds, the probes and the row draw")
    audit.add_argument("--rows", type=int, help="audit a hash-drawn share of about this many rows (default: all)")
    audit.add_argument("--json", action="store_true", help="print the stored record as JSON")
    audit.add_argument(
        "--given",
        metavar="COLUMN",
        help="a categorical context column of the sample: every probe is then also trained and tested within each "
        "of its values, against what the context alone tells (default: the column the version was fitted with, "
        "--given, when the sample has it)",
    )
    audit.add_argument(
        "--group",
        metavar="COLUMN",
        help="a column naming each row's group (an author, an account, a first name, a site): every probe's folds "
        "keep each group in one fold, and the audit sets the linear probe on ordinary folds beside them",
    )
    audit.set_defaults(handler="audit")

    versions = commands.add_parser(
        "versions", parents=common, help="list the versions of an eraser and the aliases on them"
    )
    versions.add_argument("name")
    versions.add_argument("--json", action="store_true", help="machine-readable output")
    versions.set_defaults(handler="versions")

    show = commands.add_parser("show", parents=common, help="show a version's card")
    show.add_argument("name")
    show.add_argument("version", help="a version id, its sequence number (3 or v3), or an alias")
    show.add_argument(
        "--json",
        action="store_true",
        help="print the version's evidence as JSON: its card, verdict, fresh audits and live checks "
        "(docs/version-evidence.schema.json)",
    )
    show.set_defaults(handler="show")

    compare = commands.add_parser("compare", parents=common, help="two versions' figures side by side")
    compare.add_argument("name")
    compare.add_argument("left")
    compare.add_argument("right")
    compare.set_defaults(handler="compare")

    promote = commands.add_parser("promote", parents=common, help="point an alias at a version (verified first)")
    promote.add_argument("name")
    promote.add_argument("version")
    promote.add_argument("--alias", default=DEFAULT_ALIAS)
    promote.add_argument("--reason", default="", help="recorded in the history (needed with --force)")
    _force_option(promote)
    promote.add_argument(
        "--allow-dimension-change", action="store_true", help="accept a version of another dimension than the alias's"
    )
    promote.set_defaults(handler="promote")

    rollback = commands.add_parser("rollback", parents=common, help="move an alias back to its previous target")
    rollback.add_argument("name")
    rollback.add_argument("--alias", default=DEFAULT_ALIAS)
    rollback.add_argument("--reason", default="")
    rollback.add_argument("--allow-dimension-change", action="store_true")
    rollback.set_defaults(handler="rollback")

    remove_alias = commands.add_parser(
        "remove-alias", parents=common, help="remove an alias (a damaged one too); its versions stay"
    )
    remove_alias.add_argument("name")
    remove_alias.add_argument("alias")
    remove_alias.add_argument("--reason", default="")
    remove_alias.set_defaults(handler="remove_alias")

    history = commands.add_parser("history", parents=common, help="every promote, rollback and alias removal, in order")
    history.add_argument("name")
    history.add_argument("--json", action="store_true", help="machine-readable output")
    history.set_defaults(handler="history")

    verify = commands.add_parser("verify", parents=common, help="check every checksum; exit 1 on any failure")
    verify.add_argument("name", nargs="?")
    verify.set_defaults(handler="verify")

    report = commands.add_parser("report", parents=common, help="write a version's self-contained HTML report")
    report.add_argument("name")
    report.add_argument("version")
    report.add_argument("--out", required=True, help="the .html file to write")
    report.set_defaults(handler="report")

    apply = commands.add_parser(
        "apply", parents=common, help="clean a whole corpus offline (.npy or Parquet) with a stored version"
    )
    apply.add_argument("name")
    target = apply.add_mutually_exclusive_group()
    target.add_argument("--version", help="a version id or sequence number")
    target.add_argument("--alias", help=f"an alias (default {DEFAULT_ALIAS})")
    apply.add_argument("--in", dest="source", required=True, help="the corpus: .npy or .parquet")
    apply.add_argument(
        "--out", dest="target", required=True, help="the cleaned corpus, same format; or a .faiss index of a .npy"
    )
    apply.add_argument(
        "--index", dest="index_factory", default=INDEX_FACTORY,
        help="the faiss factory string of a .faiss output, e.g. HNSW32 (inner product)",
    )  # fmt: skip
    apply.add_argument("--embeddings", default=EMBEDDINGS_KEY, help="the Parquet embedding column")
    apply.add_argument("--chunk-rows", type=int, default=APPLY_CHUNK_ROWS, help="rows cleaned at a time")
    apply.set_defaults(handler="apply")

    patrol = commands.add_parser(
        "patrol",
        parents=common,
        help="ask a running service for its drift and leakage checks and record each answer in the registry",
    )
    patrol.add_argument("name")
    patrol.add_argument(
        "--service",
        action="append",
        default=[],
        help="the service's base URL, e.g. http://veil.internal:8080; repeatable: each is a replica, and every "
        "round checks their recent traffic merged, naming any that does not answer",
    )
    patrol.add_argument(
        "--replicas-of",
        action="append",
        default=[],
        metavar="URL",
        help="a base URL whose host name resolves to every replica (a Kubernetes headless Service, a Compose "
        "service), e.g. http://veil-replicas:8080: resolved at each round, every address is a replica "
        "(repeatable, and may go with --service)",
    )
    patrol.add_argument(
        "--every",
        type=float,
        default=300.0,
        help="seconds per slot: one round, and one record, per slot (default 300; with --once, the schedule's "
        "interval, so a retried run records nothing twice)",
    )
    rounds = patrol.add_mutually_exclusive_group()
    rounds.add_argument("--once", action="store_true", help="one round, then stop (for a scheduler)")
    rounds.add_argument("--rounds", type=int, help="this many rounds, one per slot, then stop (default: until stopped)")
    patrol.add_argument(
        "--sample",
        help="post this sample of raw live vectors each round (.npy, or .npz with --embeddings and optionally "
        "--attribute labels) instead of checking the service's recent traffic",
    )
    patrol.add_argument("--embeddings", default=EMBEDDINGS_KEY, help="key of the vectors in a .npz sample")
    patrol.add_argument(
        "--attribute",
        action="append",
        default=[],
        help="key of an attribute's labels in a .npz sample (repeatable, for a version of several attributes)",
    )
    patrol.add_argument(
        "--given",
        metavar="COLUMN",
        help="key of a context column in a .npz sample (a field, a query's category): the leakage is also measured "
        "within each of its values, against what the context alone tells",
    )
    patrol.add_argument(
        "--continuous",
        action="append",
        default=[],
        metavar="NAME",
        help="attribute NAME holds numbers (a continuous attribute; repeatable); every other holds class names",
    )
    _fail_on_option(patrol)
    patrol.set_defaults(handler="patrol")

    checks = commands.add_parser("checks", parents=common, help="the recorded live checks of an eraser, in order")
    checks.add_argument("name")
    checks.add_argument(
        "--since", help="from this time on: an ISO date or time, or a span back from now (30m, 24h, 7d)"
    )
    checks.add_argument("--json", action="store_true", help="machine-readable output")
    checks.set_defaults(handler="checks")

    serve = commands.add_parser(
        "serve", parents=common, help="run the HTTP service (uvicorn); other settings come from VEIL_... variables"
    )
    serve.add_argument("--name", action="append", dest="names", metavar="NAME", help="serve this eraser (repeatable)")
    serve.add_argument("--alias", default=DEFAULT_ALIAS, help=f"the alias served (default {DEFAULT_ALIAS})")
    serve.add_argument("--host", default="127.0.0.1")
    serve.add_argument("--port", type=int, default=8080)
    serve.add_argument("--workers", type=int, default=1, help="uvicorn worker processes")
    serve.add_argument(
        "--http",
        choices=("httptools", "h11"),
        default="httptools",
        help="HTTP stack: httptools on uvloop (default, C parsers) or h11 on asyncio (pure Python, slower)",
    )
    serve.set_defaults(handler="serve")
    return parser
