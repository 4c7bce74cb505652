"""``/v1/erasers/{name}/drift``: drift and leakage checks on a posted sample or on recent traffic."""

from __future__ import annotations

from typing import Annotated, Any

import numpy as np
from fastapi import APIRouter, Depends, Request
from fastapi.concurrency import run_in_threadpool
from numpy.typing import NDArray

from veil.checks.drift import check_drift
from veil.server.catalog import Catalog, ServedVersion
from veil.server.codecs import JSON_MEDIA_TYPE
from veil.server.dependencies import (
    BATCH_PARAMETERS,
    PIN_PARAMETERS,
    EraserName,
    batch_call,
    get_catalog,
    get_metrics,
    get_reservoirs,
    pin_of,
    require_data_token,
)
from veil.server.errors import ServiceError, error_responses
from veil.server.metrics import DRIFT_LEVELS, ServiceMetrics
from veil.server.reservoir import ReservoirBank
from veil.server.routers.erasers import BATCH_ERRORS, DATA_TOKEN_ERRORS, decode_batch, pick_version

router = APIRouter(prefix="/v1/erasers", tags=["drift"])

_DRIFT_BODY = {
    "content": {
        "application/json": {
            "schema": {
                "type": "object",
                "required": ["vectors"],
                "properties": {
                    "vectors": {"type": "array", "items": {"type": "array", "items": {"type": "number"}}},
                    "labels": {
                        "oneOf": [
                            {"type": "array", "items": {"type": "string"}},
                            {
                                "type": "object",
                                "additionalProperties": {
                                    "type": "array",
                                    "items": {"oneOf": [{"type": "string"}, {"type": "number"}]},
                                },
                            },
                        ],
                        "description": "attribute labels; for a version of several attributes, an object of "
                        "labels by attribute, numbers for a continuous one (attributes left out are checked with "
                        "pseudo-labels)",
                    },
                    "context": {
                        "type": "array",
                        "items": {"oneOf": [{"type": "string"}, {"type": "number"}]},
                        "description": "each vector's value of a context column (a field, a query's category): the "
                        "leakage is then also measured within each value, against what the context alone tells "
                        "(without it, the population's figures only)",
                    },
                },
            }
        },
        "application/x-npy": {"schema": {"type": "string", "format": "binary"}},
    },
    "required": True,
}


def _class_names(value: object) -> bool:
    return isinstance(value, list) and all(isinstance(v, str) for v in value)


def _context_values(value: object) -> bool:
    return isinstance(value, list) and all(isinstance(v, (str, int, float)) and not isinstance(v, bool) for v in value)


def _labels_by_attribute(value: object) -> bool:
    return isinstance(value, dict) and all(
        isinstance(column, list) and all(isinstance(v, (str, int, float)) and not isinstance(v, bool) for v in column)
        for column in value.values()
    )


async def _run(
    served: ServedVersion,
    raw: NDArray[np.floating],
    labels: list[str] | dict[str, list[Any]] | None,
    catalog: Catalog,
    metrics: ServiceMetrics,
    context: list[Any] | None = None,
) -> dict[str, Any]:
    served.check_dim(raw)
    try:
        # Probes take a second or two: off the event loop.
        report = await run_in_threadpool(
            check_drift,
            served.artifact,
            served.reference,
            served.whitening,
            served.thresholds,
            raw,
            classes=served.classes,
            labels=labels,
            context=context,
            calibration=served.calibration,
        )
    except ValueError as error:
        raise ServiceError("invalid_request", str(error)) from None
    if catalog.served.get(served.name) is served:
        # The gauge speaks for the version served; a check of a pinned candidate must not page anyone.
        metrics.drift_status.labels(served.name).set(DRIFT_LEVELS[report.status])
    return {"eraser": served.name, "version": served.version_id, **report.to_dict()}


@router.post(
    "/{name}/drift",
    summary="Drift and leakage of a posted sample of raw live embeddings (labels optional)",
    openapi_extra={"requestBody": _DRIFT_BODY, "parameters": BATCH_PARAMETERS},
    responses=error_responses(*BATCH_ERRORS),
)
async def drift_of_sample(name: EraserName, request: Request) -> dict[str, Any]:
    call = await batch_call(request)
    catalog: Catalog = request.app.state.catalog
    served = await pick_version(catalog, name, call.pin, call.model)
    vectors, fields = decode_batch(call.body, call.media)
    labels = fields.get("labels") if call.media == JSON_MEDIA_TYPE else None
    if labels is not None and not (_class_names(labels) or _labels_by_attribute(labels)):
        raise ServiceError(
            "invalid_request",
            '"labels" must be a list of class names (strings), or an object of lists of class names or numbers',
        )
    context = fields.get("context") if call.media == JSON_MEDIA_TYPE else None
    if context is not None and not _context_values(context):
        raise ServiceError("invalid_request", '"context" must be a list of values (strings or numbers), one per vector')
    return await _run(served, vectors, labels, catalog, request.app.state.metrics, context)


@router.get(
    "/{name}/drift",
    summary="Drift and leakage of the distinct vectors this replica has recently seen (unlabelled)",
    dependencies=[Depends(require_data_token)],
    openapi_extra={"parameters": PIN_PARAMETERS},
    responses=error_responses(
        *DATA_TOKEN_ERRORS, "unknown_eraser", "unknown_version", "version_unavailable", "no_traffic", "invalid_request"
    ),
)
async def drift_of_traffic(
    name: EraserName,
    request: Request,
    catalog: Annotated[Catalog, Depends(get_catalog)],
    metrics: Annotated[ServiceMetrics, Depends(get_metrics)],
    reservoirs: Annotated[ReservoirBank, Depends(get_reservoirs)],
) -> dict[str, Any]:
    # The reservoir holds raw vectors, so a pinned version (a candidate, say) is checked on the same traffic.
    served = await pick_version(catalog, name, pin_of(request))
    reservoir = reservoirs.get(name)
    sample = reservoir.sample() if reservoir is not None else np.empty((0, served.dim), dtype=np.float32)
    if sample.shape[0] == 0:
        raise ServiceError("no_traffic", f"this replica has seen no traffic for {name} yet")
    result = await _run(served, sample, None, catalog, metrics)
    return {**result, "traffic_seen": reservoir.seen if reservoir is not None else 0}
