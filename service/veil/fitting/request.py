"""One description of a fit: what to fit, how to audit it, where to store it, and how to read the sample.

``veil fit`` builds a :class:`FitRequest` from its options, the Python API
takes one (:func:`veil.fitting.job.fit_version`), and the version's card
records it (``card["request"]``), so a version says how it was made in the
same words it was asked for.  Every part checks its own values when it is
made: a request that exists can be run.

>>> FitRequest(MethodSpec("leace"), StoreSpec("profiles-minilm", alias="live"))  # doctest: +ELLIPSIS
FitRequest(fit=MethodSpec(method='leace', ...), store=StoreSpec(name='profiles-minilm', alias='live', ...), ...)
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import KW_ONLY, dataclass, field
from types import MappingProxyType
from typing import Any

from veil.checks.thresholds import AlertThresholds, AuditThresholds
from veil.checks.verdict import THREATS, check_claims
from veil.defaults import ENGINES, LIVE_PROBE_DRAWS, STREAM_CHUNK_ROWS
from veil.errors import DataError
from veil.registry.naming import check_name
from veil.samples.embedding_model import EmbeddingModel

#: A strength of a sweep: a count, or None for a method's full value (``all`` on the command line).
SweepValue = int | None

#: The methods that can guard an attribute within a context: the first two fit from moments, which merge by
#: value; transport fits one class transport per value on the fitting sample's rows.
CONTEXT_METHODS = ("leace", "meanproj", "transport")

#: When the audit measures the rows a fit needs (:class:`AuditSpec`'s ``rows_curve``).
ROWS_CURVE = ("auto", "always", "never")


@dataclass(frozen=True)
class MethodSpec:
    """What to fit: the method, its options, the split and any sweep of its strength.

    Parameters
    ----------
    method : {"leace", "meanproj", "inlp", "rlace", "transport"}
    params : mapping
        Keyword arguments of the method's estimator (see :func:`veil.fitting.methods.parse_parameters`).
    holdout : float, default=0.2
        Share of rows held out for the audit, drawn by a seeded hash of the row index.
    seed : int, default=0
        Seeds the split, the probes and any randomised method.
    normalize : bool, default=False
        Re-normalise served vectors to unit length.
    sweep : bool, default=False
        Also fit the method at every strength of a grid and measure each point on the held-out rows
        (see :mod:`veil.fitting.sweep`); implied by ``targets``.
    sweep_values : tuple, optional
        The strengths instead of the method's default grid.
    targets : tuple of str
        Targets such as ``"nn-attribute <= base + 0.05"``: the version stored is the sweep's point of least
        distortion that meets every one.
    given : str or tuple of str, optional
        Categorical context columns (a field, a query's category): every categorical attribute is also guarded
        within every value of each column on its own, ``Cov(x', z | column = value) = 0`` on the fitting rows
        (leace and meanproj; the sample is read with the same columns, see
        :func:`veil.samples.sources.load_labelled_sample`).  Not within the combinations of several columns:
        for those, give one column holding the combined value (see :mod:`veil.maps.given`).  Stored as a tuple.
    guard_population : bool, default=True
        With a context, also guard the population as a whole.  False guards within the values only: what the
        context itself says about the attribute (fields skewed by it) then stays readable across values.
    pool_small_values : bool, default=False
        A context value with a class of too few fitting rows (:data:`veil.defaults.MIN_CLASS_ROWS`) is refused,
        naming it; with this, such values of a column are pooled into one group instead, whose guarantee holds
        for their rows together (the card lists them).
    """

    method: str
    _: KW_ONLY
    params: Mapping[str, Any] = field(default_factory=dict)
    holdout: float = 0.2
    seed: int = 0
    normalize: bool = False
    sweep: bool = False
    sweep_values: tuple[SweepValue, ...] | None = None
    targets: tuple[str, ...] = ()
    given: str | tuple[str, ...] | None = None
    guard_population: bool = True
    pool_small_values: bool = False

    def __post_init__(self) -> None:
        if not 0.0 < self.holdout < 1.0:
            raise DataError(f"the held-out share must be between 0 and 1, got {self.holdout}")
        if isinstance(self.given, str):
            object.__setattr__(self, "given", (self.given,))
        elif self.given is not None:
            object.__setattr__(self, "given", tuple(self.given))
        self._check_context()
        # Frozen all the way down: a request is a record, and the card is written from it after the fit.
        object.__setattr__(self, "params", MappingProxyType(dict(self.params)))
        object.__setattr__(self, "targets", tuple(self.targets))
        if self.sweep_values is not None:
            object.__setattr__(self, "sweep_values", tuple(self.sweep_values))

    def _check_context(self) -> None:
        """Refuse a context the method or the rest of the request cannot go with, in one line."""
        if self.given is None:
            if not self.guard_population:
                raise DataError("guarding within a context only (--within-only) needs a context column (--given)")
            if self.pool_small_values:
                raise DataError("pooling small context values (--pool-small-values) needs a context column (--given)")
            return
        if not self.given:
            raise DataError("given names no context column; leave it out to guard the population only")
        keys = self.context_columns
        twice = [key for position, key in enumerate(keys) if key in keys[:position]]
        if twice:
            raise DataError(f"the context {twice[0]!r} is given twice; give each context column once")
        if self.method not in CONTEXT_METHODS:
            raise DataError(f"{self.method} cannot guard within a context (--given); use {', '.join(CONTEXT_METHODS)}")
        if self.method == "transport" and not self.guard_population:
            raise DataError(
                "transport --given moves the classes within each value only (then_leace=true adds LEACE guarding the "
                "population too): --within-only applies to leace and meanproj"
            )
        if self.method == "transport" and (len(keys) > 1 or self.pool_small_values):
            raise DataError(
                "transport --given moves the classes within the values of one context column, and a value short of a "
                "class falls back to the population's transport: several --given columns and --pool-small-values "
                "apply to leace and meanproj"
            )
        if self.sweeps:
            raise DataError(
                "a sweep measures the attribute over the whole population; fit --given without --sweep/--target"
            )

    @property
    def context_columns(self) -> tuple[str, ...]:
        """The context columns, in the order given (empty: the population only)."""
        return () if self.given is None else tuple(self.given)

    @property
    def sweeps(self) -> bool:
        """Whether the fit sweeps the method's strength (asked for, or implied by targets)."""
        return self.sweep or bool(self.targets)

    def to_dict(self) -> dict[str, Any]:
        return {
            "method": self.method,
            "params": dict(self.params),
            "holdout": self.holdout,
            "seed": self.seed,
            "normalize": self.normalize,
            "sweep": self.sweeps,
            "sweep_values": None if self.sweep_values is None else list(self.sweep_values),
            "targets": list(self.targets),
            "given": None if self.given is None else list(self.context_columns),
            "guard_population": self.guard_population,
            "pool_small_values": self.pool_small_values,
        }


@dataclass(frozen=True, kw_only=True)
class AuditSpec:
    """How to audit the fit on its held-out rows, and the levels its audits and live checks are judged by.

    Parameters
    ----------
    nonlinear : bool, default=True
        Also audit with the nonlinear probes (quadratic, RBF kernel, boosted trees, MLP).
    rows : int, optional
        At most about this many held-out rows are audited, drawn by a hash.  Default: every row for a sample of
        one partition, :data:`veil.defaults.AUDIT_ROWS` for a streamed one.
    thresholds : AuditThresholds, optional
        Levels the verdict of this fit's audit and of later fresh audits is judged by (the defaults otherwise;
        see :mod:`veil.checks.verdict`).
    live_thresholds : AlertThresholds, optional
        Levels of the version's live checks (the defaults otherwise).
    claims : tuple of str, optional
        The threats the version claims to guard (:data:`veil.checks.verdict.THREATS`), replacing those its method
        is built to remove (see :meth:`FitRequest.claims`): the verdict's headline judges these and lists the
        others, measured, as not claimed.  Widen a claim a method does not make only on evidence (a transport
        version that nonlinear probes do not read on fresh samples), or narrow it.
    group : str, optional
        The sample's group column (``--group``; the sample is read with it, see :mod:`veil.samples.groups`):
        whole groups are held out, the probes' folds keep each group in one fold, and the audit reads the
        linear probe on ordinary folds, on group folds and as a transfer probe.
    rows_curve : {"auto", "always", "never"}, default="auto"
        Whether the audit refits the method on 1/8, 1/4 and 1/2 of the fitting rows to measure the rows a fit
        needs (:mod:`veil.fitting.rows`): ``auto`` for the methods whose refits are quick, ``always`` for every
        method (INLP and transport refit slowly), ``never`` to skip it.
    live_draws : int, default=40
        No-drift live samples drawn from the held-out rows per sample size for each probe figure, to calibrate
        the live checks' levels on the version's own noise (the shift figures draw
        :data:`veil.checks.null_draws.SHIFT_DRAWS`); 0 stores no calibration, and the version's live checks
        keep the fixed levels of ``live_thresholds``.  See :mod:`veil.checks.calibration`.
    thorough : bool, default=False
        The independence tests' thorough setting (``--thorough``): more permutations behind each p-value, and
        power on a finer grid with more draws, the readers' test's included (see
        :mod:`veil.audit.independence_run`; the costs are in docs/independence.md).  Fresh audits take their own.
    """

    nonlinear: bool = True
    rows: int | None = None
    thresholds: AuditThresholds | None = None
    live_thresholds: AlertThresholds | None = None
    claims: tuple[str, ...] | None = None
    group: str | None = None
    rows_curve: str = "auto"
    live_draws: int = LIVE_PROBE_DRAWS
    thorough: bool = False

    def __post_init__(self) -> None:
        if self.rows_curve not in ROWS_CURVE:
            raise DataError(f"unknown rows_curve {self.rows_curve!r}; choose one of {', '.join(ROWS_CURVE)}")
        if self.live_draws != 0 and self.live_draws < 3:
            raise DataError(f"live_draws is 0 (no calibration) or at least 3, got {self.live_draws}")
        if self.rows is not None and self.rows < 2:
            raise DataError(f"the audit sample needs at least 2 rows, got {self.rows}")
        if self.claims is not None:
            claims = tuple(self.claims)
            twice = [claim for position, claim in enumerate(claims) if claim in claims[:position]]
            if not claims or twice:
                raise DataError(
                    "claim each threat once, and at least one"
                    + ("" if not twice else f" ({twice[0]!r} is claimed twice)")
                )
            try:
                object.__setattr__(self, "claims", check_claims(claims))
            except ValueError as error:
                raise DataError(f"--claim: {error}") from None

    def to_dict(self) -> dict[str, Any]:
        """The audit as asked for, with the levels in force (the defaults where none were given)."""
        return {
            "probes": "all" if self.nonlinear else "linear",
            "rows": self.rows,
            "thresholds": (self.thresholds or AuditThresholds()).to_dict(),
            "live_thresholds": (self.live_thresholds or AlertThresholds()).to_dict(),
            "claims": None if self.claims is None else list(self.claims),
            # Only when set: the request of a fit without a group reads as it did before groups.
            **({} if self.group is None else {"group": self.group}),
            "rows_curve": self.rows_curve,
            "live_draws": self.live_draws,
            "thorough": self.thorough,
        }


@dataclass(frozen=True)
class StoreSpec:
    """Where to store the version: the eraser's name in the registry, and an alias to point at it.

    Parameters
    ----------
    name : str
        The eraser's name (one per embedding space and attribute).
    alias : str, optional
        Point this alias at the new version once it is stored.
    reason : str
        Recorded in the history if the alias is moved (a sentence naming the method by default).
    embedding_model : EmbeddingModel, optional
        The model that made the sample's vectors (``EmbeddingModel.parse("NAME@VERSION")``).  The card records
        it with the dimension, and the service refuses a caller who states another; None takes the sample
        file's, if it states one (see :mod:`veil.samples.embedding_model`), else the version accepts any caller.
    force : bool, default=False
        Move the alias even if the new version's verdict is alert (the alias is otherwise left as it was, the
        version stored all the same); needs a ``reason``, which the history records with the fact it was forced.
    """

    name: str
    _: KW_ONLY
    alias: str | None = None
    reason: str = ""
    embedding_model: EmbeddingModel | None = None
    force: bool = False

    def __post_init__(self) -> None:
        check_name(self.name)
        if self.alias is not None:
            check_name(self.alias, what="alias")
        if self.embedding_model is not None and not isinstance(self.embedding_model, EmbeddingModel):
            raise DataError(
                f"embedding_model is an EmbeddingModel (EmbeddingModel.parse('NAME@VERSION')), got "
                f"{type(self.embedding_model).__name__}"
            )

        if self.force and (self.alias is None or not self.reason.strip()):
            # Refused before the fit: a forced move is recorded with why, and forcing nothing is a slip.
            raise DataError("--force moves an alias onto a version whose verdict is alert: give --alias and --reason")

    def to_dict(self) -> dict[str, Any]:
        model = None if self.embedding_model is None else self.embedding_model.text
        return {
            "name": self.name,
            "alias": self.alias,
            "reason": self.reason,
            "embedding_model": model,
            "force": self.force,
        }


@dataclass(frozen=True, kw_only=True)
class ReadingSpec:
    """How to read the sample: chunk size, the fitting rows a method that needs rows is given, and the engine.

    Parameters
    ----------
    chunk_rows : int
        Rows read at a time from a streamed sample (a sample in memory is one chunk).
    fit_sample_rows : int, optional
        At most about this many fitting rows are given to the methods that need rows (not moments), drawn by a
        hash.  Default: every row for a sample of one partition, :data:`veil.defaults.FIT_SAMPLE_ROWS` for a
        streamed one, so that its memory is O(d² + chunk_rows · d + audit_rows · d) whatever its size.
    engine : {"local", "dask"}
        Run the pass in this process, or on dask.distributed workers (see :mod:`veil.fitting.distributed`).
    scheduler : str, optional
        Address of a running Dask scheduler; None starts a local cluster of ``workers`` processes.
    workers : int, default=2
    """

    chunk_rows: int = STREAM_CHUNK_ROWS
    fit_sample_rows: int | None = None
    engine: str = "local"
    scheduler: str | None = None
    workers: int = 2

    def __post_init__(self) -> None:
        if self.chunk_rows < 1:
            raise DataError(f"chunk_rows must be at least 1, got {self.chunk_rows}")
        if self.fit_sample_rows is not None and self.fit_sample_rows < 2:
            raise DataError(f"the fitting sample needs at least 2 rows, got {self.fit_sample_rows}")
        if self.engine not in ENGINES:
            raise DataError(f"unknown engine {self.engine!r}; choose one of {', '.join(ENGINES)}")
        if self.workers < 1:
            raise DataError(f"workers must be at least 1, got {self.workers}")

    def to_dict(self) -> dict[str, Any]:
        return {
            "chunk_rows": self.chunk_rows,
            "fit_sample_rows": self.fit_sample_rows,
            "engine": self.engine,
            "scheduler": self.scheduler,
            "workers": self.workers,
        }


@dataclass(frozen=True)
class FitRequest:
    """A whole fit: what to fit, where to store it, how to audit it and how to read the sample."""

    fit: MethodSpec
    store: StoreSpec
    _: KW_ONLY
    audit: AuditSpec = field(default_factory=AuditSpec)
    reading: ReadingSpec = field(default_factory=ReadingSpec)

    def __post_init__(self) -> None:
        within = [claim for claim in self.audit.claims or () if claim.startswith("context-")]
        if within and self.fit.given is None:
            raise DataError(f"the threat {within[0]!r} is within a context: claim it for a fit with --given")

    @property
    def claims(self) -> tuple[str, ...]:
        """The threats the version claims to guard: those asked for, else those its method is built to remove.

        Every method here is built to leave nothing a linear model reads: ``linear`` (the population), and with a
        context ``context-linear`` (within each value).  The population is not claimed where it is not guarded:
        ``--within-only``, or transport within a context without LEACE after it.  None is built against
        nonlinear readers or neighbourhoods (transport matches each class's mean and covariance through a
        classifier that can err: measured, not guaranteed), so those are measured and shown, not claimed.
        """
        if self.audit.claims is not None:
            return self.audit.claims
        spec = self.fit
        population = spec.guard_population
        if spec.given is not None and spec.method == "transport":
            population = bool(spec.params.get("then_leace", False))
        claims = (["linear"] if population else []) + (["context-linear"] if spec.given is not None else [])
        return tuple(name for name in THREATS if name in claims)

    def to_dict(self) -> dict[str, Any]:
        """The request as the card records it (JSON-safe)."""
        return {
            "fit": self.fit.to_dict(),
            "audit": self.audit.to_dict(),
            "store": self.store.to_dict(),
            "reading": self.reading.to_dict(),
        }
