"""The erasers a service process serves, and how a new version is swapped in without downtime.

Each eraser is a :class:`ServedVersion`: immutable, loaded and verified in
full, with everything a request needs computed once at load (the factored
map, counterfactual shifts, whitening for drift checks).  The catalog holds
one dict ``name -> ServedVersion`` and *replaces* it on reload, so a request
that has picked its version keeps it until it finishes, and every request
sees either the old or the new version, never a mix.
"""

from __future__ import annotations

import logging
import math
import threading
from collections import OrderedDict
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from veil.checks.calibration import CALIBRATION_FILE, LiveCalibration
from veil.checks.reference import REFERENCE_FILE, ReferenceStatistics
from veil.checks.thresholds import AlertThresholds
from veil.errors import DataError
from veil.maps.artifact import MapArtifact
from veil.registry import IntegrityError, NotFoundError, Registry, RegistryError, StoredVersion
from veil.registry.card import card_model
from veil.registry.errors import InvalidReferenceError
from veil.registry.naming import parse_version_id
from veil.samples.embedding_model import EmbeddingModel
from veil.server.errors import ServiceError
from veil.server.metrics import ServiceMetrics

logger = logging.getLogger("veil.server")


@dataclass(frozen=True, eq=False)
class ServedVersion:
    """One loaded, verified version, ready for the hot path."""

    name: str
    version_id: str
    artifact: MapArtifact
    card: dict[str, Any]
    reference: ReferenceStatistics
    thresholds: AlertThresholds
    classes: list[str]
    whitening: NDArray[np.float64] = field(repr=False)
    #: The embedding model the version was fitted on (None: its card records none, and any caller is accepted).
    embedding_model: EmbeddingModel | None = None
    #: The live checks' no-drift draws (None: a version stored before them, judged by fixed levels).
    calibration: LiveCalibration | None = field(default=None, repr=False)

    @property
    def dim(self) -> int:
        return self.artifact.map.dim

    @classmethod
    def from_stored(cls, stored: StoredVersion, *, threshold_overrides: dict[str, Any] | None) -> ServedVersion:
        try:
            reference = ReferenceStatistics.from_bytes(stored.files[REFERENCE_FILE])
        except (KeyError, ValueError) as error:
            raise IntegrityError(f"{stored.name} {stored.id}: reference statistics unreadable ({error})") from None
        card = dict(stored.card)
        thresholds = AlertThresholds.from_dict({**card.get("thresholds", {}), **(threshold_overrides or {})})
        whitening = reference.whitening()
        # A version stored before live levels were calibrated has no calibration: its checks keep the fixed levels.
        calibration = None
        if CALIBRATION_FILE in stored.files:
            try:
                calibration = LiveCalibration.from_bytes(stored.files[CALIBRATION_FILE])
            except (KeyError, ValueError) as error:
                raise IntegrityError(f"{stored.name} {stored.id}: live calibration unreadable ({error})") from None
        try:
            model = card_model(card)
        except (KeyError, TypeError, DataError) as error:
            raise IntegrityError(
                f"{stored.name} {stored.id}: the card's embedding model is unreadable ({error})"
            ) from None
        return cls(
            name=stored.name,
            version_id=stored.id,
            artifact=stored.artifact,
            card=card,
            reference=reference,
            thresholds=thresholds,
            classes=[str(c) for c in card.get("attribute", {}).get("classes", [])],
            whitening=whitening,
            embedding_model=model,
            calibration=calibration,
        )

    def check_model(self, stated: EmbeddingModel | None) -> None:
        """Refuse a caller who states another embedding model than the one this version was fitted on.

        No statement, or a version that records no model, is accepted (the dimension is still checked).
        """
        recorded = self.embedding_model
        if stated is None or recorded is None or not stated.differs_from(recorded):
            return
        raise ServiceError(
            "embedding_model_mismatch",
            f"{self.name} {self.version_id} was fitted on embedding model {recorded.text!r}, and the request states "
            f"{stated.text!r} (X-Veil-Embedding-Model): another model's vectors would be moved to meaningless places; "
            f"embed with {recorded.text!r}, or use a version fitted on {stated.text!r}",
            details={"stated": stated.text, "recorded": recorded.text},
        )

    def apply(self, x: NDArray[np.floating]) -> NDArray[np.floating]:
        self.check_dim(x)
        return self.artifact.apply(x)

    @property
    def attributes(self) -> list[str]:
        """The attributes a version of several guards (the intersection, derived, is not named); empty otherwise."""
        return [block.name for block in self.artifact.moments.blocks if not block.joint]

    def counterfactual(self, x: NDArray[np.floating], target: str | dict[str, Any]) -> NDArray[np.floating]:
        self.check_dim(x)
        if self.attributes or isinstance(target, dict):
            return self._counterfactual_by_attribute(x, target)
        if target not in self.classes:
            raise ServiceError("unknown_class", f"{target!r} is not a class of {self.name}; classes: {self.classes}")
        return self.artifact.counterfactual(x, self.classes.index(target))

    def _counterfactual_by_attribute(
        self, x: NDArray[np.floating], target: str | dict[str, Any]
    ) -> NDArray[np.floating]:
        """A target per attribute: a class of each categorical one, a number for each continuous one."""
        if not self.attributes:
            raise ServiceError("invalid_request", f"{self.name} guards one attribute: give its target class as text")
        if not isinstance(target, dict) or sorted(target) != sorted(self.attributes):
            raise ServiceError(
                "invalid_request",
                f"{self.name} guards {', '.join(self.attributes)}: give a target for each, as a JSON object",
            )
        target = dict(target)  # numbers are normalised below; the caller's mapping stays as given
        for block in self.artifact.moments.blocks:
            if block.joint:
                continue
            wanted = target[block.name]
            if block.labels is None:
                if isinstance(wanted, bool) or not isinstance(wanted, (int, float)) or not _finite_float(wanted):
                    raise ServiceError(
                        "invalid_request", f"the target of continuous attribute {block.name!r} must be a finite number"
                    )
                target[block.name] = float(wanted)
            elif str(wanted) not in block.labels.astype(str).tolist():
                classes = block.labels.astype(str).tolist()
                raise ServiceError("unknown_class", f"{wanted!r} is not a class of {block.name!r}; classes: {classes}")
        try:
            target_mean = self.artifact.moments.conditional_mean(target)
        except ValueError as error:  # a version fitted on incomplete labels takes no targets
            raise ServiceError("invalid_request", str(error)) from None
        return self.artifact.counterfactual_towards(x, target_mean)

    def check_dim(self, x: NDArray[np.floating]) -> None:
        if x.shape[1] != self.dim:
            raise ServiceError(
                "wrong_dimension", f"{self.name} {self.version_id} expects {self.dim} dimensions, got {x.shape[1]}"
            )


@dataclass(frozen=True)
class ReloadOutcome:
    loaded: list[str]
    failed: dict[str, str]


class Catalog:
    """Served erasers at the configured alias, plus a few pinned versions, kept fresh by :meth:`reload`."""

    def __init__(
        self,
        registry: Registry,
        *,
        names: list[str],
        alias: str,
        metrics: ServiceMetrics,
        max_pinned: int = 8,
        threshold_overrides: dict[str, Any] | None = None,
    ) -> None:
        self.registry = registry
        self.alias = alias
        self.metrics = metrics
        self._configured = list(names)
        self._max_pinned = max_pinned
        self._overrides = threshold_overrides
        self._served: dict[str, ServedVersion] = {}
        self._pinned: OrderedDict[tuple[str, str], ServedVersion] = OrderedDict()
        self._pinned_lock = threading.Lock()
        self._reload_lock = threading.Lock()
        self.failures: dict[str, str] = {}
        #: The failures of erasers that exist but could not be loaded (not a name the registry lacks): 503, not 404.
        self._unloadable: frozenset[str] = frozenset()
        #: What the last reload wanted served, read by ``ready()`` without touching the registry.
        self._wanted: list[str] = list(names)
        #: Why the registry gives this process nothing to serve (missing, unreadable, empty), from the last reload.
        self.registry_problem: str | None = None

    # ------------------------------------------------------------ hot path

    @property
    def served(self) -> dict[str, ServedVersion]:
        return self._served

    def wanted_names(self) -> list[str]:
        """The erasers this replica serves: those it is configured with, else every one with the served alias.

        An eraser fitted but never pointed at by the alias is not served, and keeps no replica from being ready;
        one whose alias file is damaged is wanted (and its failure reported).
        """
        if self._configured:
            return list(self._configured)
        try:
            return [name for name in self.registry.names() if self._has_alias(name)]
        except (RegistryError, OSError):
            return sorted(self._served)

    def _has_alias(self, name: str) -> bool:
        try:
            return self.registry.alias(name, self.alias) is not None
        except IntegrityError:
            return True  # damaged: wanted, so that its failure is reported

    def ready(self) -> tuple[bool, list[str]]:
        """True if every eraser the last reload wanted is loaded; otherwise the missing names (no registry read)."""
        served = self._served
        missing = [name for name in self._wanted if name not in served]
        return (not missing and bool(served)), missing

    def current(self, name: str) -> ServedVersion:
        served = self._served.get(name)
        if served is None and name in self._unloadable:
            # Wanted, but its version could not be loaded (damaged, unreadable): a condition that a repair or a
            # rollback ends, so the answer is one a client retries, not "no such eraser".
            raise ServiceError("version_unavailable", f"{name}: {self.failures[name]}")
        if served is None:
            raise ServiceError("unknown_eraser", f"no eraser {name!r} is served here; served: {sorted(self._served)}")
        return served

    def resolve(self, name: str, *, version: str | None, alias: str | None) -> ServedVersion:
        """The version a request asked for: the alias's by default, or a pinned version or alias.

        A pinned version other than the current one is loaded and verified on
        first use (call from a worker thread) and kept in a small LRU.
        """
        current = self.current(name)
        if version is None and (alias is None or alias == self.alias):
            return current
        reference = version if version is not None else alias
        assert reference is not None
        if version is not None and parse_version_id(version) is not None:
            # A full id names immutable content: once loaded, it needs no registry read again.
            with self._pinned_lock:
                known = self._pinned.get((name, version))
                if known is not None:
                    self._pinned.move_to_end((name, version))
                    return known
        try:
            version_id = self.registry.resolve(name, reference)
        except (NotFoundError, InvalidReferenceError) as error:
            raise ServiceError("unknown_version", str(error)) from None
        except (RegistryError, OSError) as error:
            raise ServiceError("version_unavailable", f"{name}: the registry cannot be read ({error})") from None
        if version_id == current.version_id:
            return current
        with self._pinned_lock:
            cached = self._pinned.get((name, version_id))
            if cached is not None:
                self._pinned.move_to_end((name, version_id))
                return cached
        loaded = self._load(name, version_id)
        if loaded.dim != current.dim:
            raise ServiceError(
                "version_unavailable",
                f"{name} {version_id} has dimension {loaded.dim}; this eraser serves {current.dim}",
            )
        with self._pinned_lock:
            self._pinned[(name, version_id)] = loaded
            while len(self._pinned) > self._max_pinned:
                self._pinned.popitem(last=False)
        return loaded

    def _load(self, name: str, version_id: str) -> ServedVersion:
        try:
            return ServedVersion.from_stored(
                self.registry.read_version(name, version_id), threshold_overrides=self._overrides
            )
        except IntegrityError as error:
            raise ServiceError("version_unavailable", str(error)) from None
        except (RegistryError, OSError, ValueError) as error:
            raise ServiceError("version_unavailable", f"{name} {version_id} cannot be loaded ({error})") from None

    # ------------------------------------------------------------ reload (off the request path)

    def reload(self) -> ReloadOutcome:
        """Re-resolve every alias; load, verify and swap in what changed.  Never raises for a bad version."""
        with self._reload_lock:
            loaded: list[str] = []
            failed: dict[str, str] = {}
            absent: set[str] = set()
            wanted = self.wanted_names()
            # An eraser no longer wanted (its alias removed) stops being served.
            updated = {name: served for name, served in self._served.items() if name in wanted}
            self._note_registry_problem(wanted)
            for name in wanted:
                old = updated.get(name)
                try:
                    version_id = self.registry.resolve(name, self.alias)
                    if old is not None and old.version_id == version_id:
                        continue
                    stored = self.registry.read_version(name, version_id)
                    dim = stored.artifact.map.dim
                    if old is not None and dim != old.dim:
                        raise IntegrityError(
                            f"{name} {version_id} has dimension {dim} but {old.version_id} serves {old.dim}; "
                            "refused: callers and indexes expect the old dimension (restart the service to change it)"
                        )
                    candidate = ServedVersion.from_stored(stored, threshold_overrides=self._overrides)
                except (RegistryError, OSError, ValueError, KeyError) as error:
                    failed[name] = str(error)
                    if isinstance(error, NotFoundError):
                        absent.add(name)  # a name the registry lacks (a typo in the settings, say): 404, not 503
                    self.metrics.reload_failures.labels(name).inc()
                    # A lasting condition is logged when it appears or changes, not at every poll.
                    if self.failures.get(name) != failed[name]:
                        logger.warning("reload refused", extra={"fields": {"eraser": name, "problem": str(error)}})
                    continue
                updated[name] = candidate
                loaded.append(f"{name} {candidate.version_id}")
                self.metrics.reloads.labels(name).inc()
                self.metrics.served(name, self.alias, None if old is None else old.version_id, candidate.version_id)
                logger.info("version loaded", extra={"fields": {"eraser": name, "version": candidate.version_id}})
            # One assignment: requests see the old dict or the new one.
            self._served = updated
            self.failures = failed
            self._unloadable = frozenset(name for name in failed if name not in absent)
            self._wanted = wanted
            for name in wanted:
                self.metrics.reload_failing.labels(name).set(1 if name in failed else 0)
            return ReloadOutcome(loaded=loaded, failed=failed)

    def _note_registry_problem(self, wanted: list[str]) -> None:
        """Keep the registry's problem for ``/readyz``; log it once when it appears or changes, not every poll."""
        problem = self.registry.problem()
        if problem is None and not wanted:
            aliased = f" with the alias {self.alias!r}" if self.registry.names() else ""
            problem = f"the registry {self.registry.url} holds no eraser{aliased}"
        if problem == self.registry_problem:
            return
        fields = {"registry": self.registry.url, "problem": problem}
        if problem is not None:
            logger.error("registry unusable", extra={"fields": fields})
        else:
            logger.info("registry readable", extra={"fields": {"registry": self.registry.url}})
        self.registry_problem = problem


def _finite_float(value: float) -> bool:
    """Whether ``value`` is a finite float64 (an integer too large for one is not: it would overflow)."""
    try:
        return math.isfinite(float(value))
    except OverflowError:
        return False
