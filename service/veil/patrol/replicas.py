"""Every replica in one check: find the replicas, fetch each one's sample of recent traffic, merge, check once.

Behind a load balancer each replica keeps a reservoir sample of its own
share of the traffic.  A round asks every replica for its sample, how many
vectors that sample stands for and the version it serves
(``GET /v1/erasers/{name}/recent``), and merges the samples of the replicas
that serve one version:

- each replica's share is weighted by what it has cleaned: from replica
  ``i``, which cleaned ``seen_i`` of the ``N = Σ seen`` vectors and holds
  ``held_i`` of them, the merge draws ``m seen_i / N`` rows without
  replacement (rounded by largest remainder), with ``m`` the largest size
  every replica can fill, ``min_i held_i N / seen_i``, so the merged sample
  is a sample of the pooled traffic, not of the replicas;
- a vector held by several replicas is kept once, and the rows are put in
  one order that depends on the vectors alone (ascending, as
  :func:`numpy.unique` sorts rows), so the merged sample of the same traffic
  is the same whichever replica saw which vector.

The merged sample is then posted to one replica of that version, pinned to
it, as a posted sample (``POST /v1/erasers/{name}/drift``): the check is the
code path and process a check of the same vectors sent to one replica
takes, with that replica's thresholds, so the two are the same check by
construction.  Replicas that serve different versions (a rollout under way)
are never merged: each version's replicas are checked on their own and
each record names the replicas serving other versions.

A replica that does not answer, or a name that does not resolve, is named
in the record.  It is never silently skipped.
"""

from __future__ import annotations

import hashlib
import socket
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any
from urllib.parse import urlsplit, urlunsplit

import numpy as np
from numpy.typing import NDArray

from veil_client import RecentTraffic

#: The merged sample is posted in one request: at most this many bytes of float32 rows, half the service's
#: default body limit (``VEIL_MAX_BODY_BYTES``), so a default service always takes it.
MERGED_BYTES = 32 << 20

#: ``socket.getaddrinfo``'s signature, as far as the discovery uses it (tests pass their own resolver).
Resolver = Callable[..., Sequence[tuple[Any, ...]]]


@dataclass(frozen=True)
class Unanswered:
    """A replica (or a name) the round could not use, and why, in words."""

    address: str
    error: str

    def to_dict(self) -> dict[str, str]:
        return {"address": self.address, "error": self.error}


@dataclass(frozen=True)
class ReplicaSet:
    """Where a round finds its replicas: addresses given, and names whose every address is a replica.

    ``services``: base URLs, each one replica.  ``replicas_of``: base URLs
    whose host name resolves to every replica (a Kubernetes headless
    Service, a Docker Compose service name); resolved again at each round,
    so replicas that come and go are followed.
    """

    services: tuple[str, ...] = ()
    replicas_of: tuple[str, ...] = ()

    def describe(self) -> str:
        """The record's ``service``: what was asked, not what it resolved to (that changes from round to round)."""
        return " ".join([*self.services, *(f"replicas-of {url}" for url in self.replicas_of)])

    def addresses(self, resolve: Resolver | None = None) -> tuple[list[str], list[Unanswered]]:
        """Every replica's base URL, in a stable order, and every name that does not resolve.

        ``resolve``: :func:`socket.getaddrinfo` (looked up at each call) unless given.
        """
        found = list(dict.fromkeys(url.rstrip("/") for url in self.services))
        failed = []
        for url in self.replicas_of:
            try:
                resolved = resolve_replicas(url, resolve)
            except (OSError, ValueError) as error:
                failed.append(Unanswered(url, f"does not resolve: {error}"))
                continue
            found += [address for address in resolved if address not in found]
        return found, failed


def resolve_replicas(url: str, resolve: Resolver | None = None) -> list[str]:
    """The base URL of every address ``url``'s host resolves to (IPv4 and IPv6), sorted, each once.

    Raises
    ------
    ValueError
        ``url`` names no host.
    OSError
        The name does not resolve (:class:`socket.gaierror`).
    """
    parts = urlsplit(url.rstrip("/"))
    if not parts.hostname:
        raise ValueError(f"{url!r} names no host")
    port = parts.port or (443 if parts.scheme == "https" else 80)
    answers = (resolve or socket.getaddrinfo)(parts.hostname, port, type=socket.SOCK_STREAM)
    hosts = sorted({str(answer[4][0]) for answer in answers})
    return [urlunsplit((parts.scheme, _netloc(host, port), parts.path, "", "")) for host in hosts]


def _netloc(host: str, port: int) -> str:
    return f"[{host}]:{port}" if ":" in host else f"{host}:{port}"


@dataclass(frozen=True)
class ReplicaSample:
    """What one replica answered: its sample, what the sample stands for, and its version."""

    address: str
    traffic: RecentTraffic

    @property
    def version(self) -> str:
        return self.traffic.version


@dataclass(frozen=True)
class MergedSample:
    """The merged sample of the replicas of one version, and how many rows each replica gave."""

    version: str
    vectors: NDArray[np.float32]
    taken: dict[str, int] = field(default_factory=dict)

    @property
    def sha256(self) -> str:
        return hashlib.sha256(np.ascontiguousarray(self.vectors).tobytes()).hexdigest()


def shares(held: Sequence[int], seen: Sequence[int], limit: int | None = None) -> list[int]:
    """How many rows to draw from each replica, in proportion to what each has cleaned.

    ``held[i]`` rows sample the ``seen[i]`` vectors replica ``i`` cleaned.
    The total ``m`` is the largest every replica can fill at its share,
    ``min_i held_i N / seen_i`` (``N = Σ seen``), at most ``limit``; replica
    ``i`` gives ``m seen_i / N`` rounded by largest remainder (ties to the
    earlier replica), in integers throughout, so round-off decides nothing.
    A replica that has cleaned nothing gives nothing.

    Examples
    --------
    >>> shares([1000, 1000, 1000], [6000, 2000, 1000])
    [1000, 333, 167]
    """
    if len(held) != len(seen) or any(h < 0 or s < 0 for h, s in zip(held, seen, strict=True)):
        raise ValueError("held and seen must be counts, one of each per replica")
    total = sum(s for h, s in zip(held, seen, strict=True) if h > 0)
    if total == 0:
        return [0] * len(held)
    size = min(h * total // s for h, s in zip(held, seen, strict=True) if h > 0 and s > 0)
    if limit is not None:
        size = min(size, limit)
    live = [s if h > 0 else 0 for h, s in zip(held, seen, strict=True)]
    quotas = [size * s // total for s in live]
    # Largest remainder: the rows left go to the replicas whose exact share lost the most to the floor.
    order = sorted(range(len(live)), key=lambda i: (-(size * live[i] % total), i))
    for index in order[: size - sum(quotas)]:
        quotas[index] += 1
    return quotas


def merge_samples(samples: Sequence[ReplicaSample], *, seed: int = 0) -> MergedSample:
    """The samples of replicas that serve one version merged into one sample of their pooled traffic.

    Raises
    ------
    ValueError
        The replicas serve different versions, or hold vectors of different dimensions.
    """
    versions = {sample.version for sample in samples}
    if len(versions) != 1:
        raise ValueError(f"samples of different versions are never merged: {sorted(versions)}")
    dims = {sample.traffic.vectors.shape[1] for sample in samples}
    if len(dims) != 1:
        raise ValueError(f"the replicas hold vectors of different dimensions: {sorted(dims)}")
    (dim,) = dims
    held = [sample.traffic.vectors.shape[0] for sample in samples]
    counts = shares(held, [sample.traffic.traffic_seen for sample in samples], limit=MERGED_BYTES // (4 * dim))
    rng = np.random.default_rng(seed)
    parts = [
        sample.traffic.vectors[np.sort(rng.choice(rows, size=count, replace=False))]
        for sample, rows, count in zip(samples, held, counts, strict=True)
    ]
    stacked = np.concatenate(parts) if parts else np.empty((0, dim), dtype=np.float32)
    # Distinct rows once, in ascending order: the same traffic gives the same sample, however it was spread.
    vectors = np.unique(np.asarray(stacked, dtype=np.float32), axis=0)
    taken = {sample.address: count for sample, count in zip(samples, counts, strict=True)}
    return MergedSample(versions.pop(), vectors, taken)
