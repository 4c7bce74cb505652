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
from veil.defaults import ENGINES, STREAM_CHUNK_ROWS
from veil.errors import DataError
from veil.registry.naming import check_name

#: A strength of a sweep: a count, or None for a method's full value (``all`` on the command line).
SweepValue = int | None

#: The methods that can guard an attribute within a context: the first two fit from moments, which merge by
#: value; transport fits one class transport per value on the fitting sample's rows.
CONTEXT_METHODS = ("leace", "meanproj", "transport")


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
    given : str, optional
        A categorical context column (a field, a query's category): the attribute is also guarded within every
        value of it, ``Cov(x', z | value) = 0`` on the fitting rows (leace and meanproj; the sample is read with
        the same column, see :func:`veil.samples.sources.load_labelled_sample`).
    guard_population : bool, default=True
        With a context, also guard the population as a whole.  False guards within the values only: what the
        context itself says about the attribute (fields skewed by it) then stays readable across values.
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
    given: str | None = None
    guard_population: bool = True

    def __post_init__(self) -> None:
        if not 0.0 < self.holdout < 1.0:
            raise DataError(f"the held-out share must be between 0 and 1, got {self.holdout}")
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
            return
        if self.method not in CONTEXT_METHODS:
            raise DataError(f"{self.method} cannot guard within a context (--given); use {', '.join(CONTEXT_METHODS)}")
        if self.method == "transport" and not self.guard_population:
            raise DataError(
                "transport --given moves the classes within each value only (then_leace=true adds LEACE guarding the "
                "population too): --within-only applies to leace and meanproj"
            )
        if self.sweeps:
            raise DataError(
                "a sweep measures the attribute over the whole population; fit --given without --sweep/--target"
            )

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
            "given": self.given,
            "guard_population": self.guard_population,
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
    """

    nonlinear: bool = True
    rows: int | None = None
    thresholds: AuditThresholds | None = None
    live_thresholds: AlertThresholds | None = None

    def __post_init__(self) -> None:
        if self.rows is not None and self.rows < 2:
            raise DataError(f"the audit sample needs at least 2 rows, got {self.rows}")

    def to_dict(self) -> dict[str, Any]:
        """The audit as asked for, with the levels in force (the defaults where none were given)."""
        return {
            "probes": "all" if self.nonlinear else "linear",
            "rows": self.rows,
            "thresholds": (self.thresholds or AuditThresholds()).to_dict(),
            "live_thresholds": (self.live_thresholds or AlertThresholds()).to_dict(),
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
    """

    name: str
    _: KW_ONLY
    alias: str | None = None
    reason: str = ""

    def __post_init__(self) -> None:
        check_name(self.name)
        if self.alias is not None:
            check_name(self.alias, what="alias")

    def to_dict(self) -> dict[str, Any]:
        return {"name": self.name, "alias": self.alias, "reason": self.reason}


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

    def to_dict(self) -> dict[str, Any]:
        """The request as the card records it (JSON-safe)."""
        return {
            "fit": self.fit.to_dict(),
            "audit": self.audit.to_dict(),
            "store": self.store.to_dict(),
            "reading": self.reading.to_dict(),
        }
