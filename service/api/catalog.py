"""The catalog endpoint: what a submission may name, for any key."""

from __future__ import annotations

from dataclasses import asdict

from flask import Response

from service.api import SealfoldBlueprint, json_response
from service.api.schemas import CatalogSchema
from service.catalog import load_catalog
from service.catalog.metrics import DEFAULT_METRICS, METRIC_OPTIONS, METRICS

blp = SealfoldBlueprint("catalog", __name__, url_prefix="/v1/catalog",
                        description="Allowed estimators, transformers and metrics.")


@blp.route("")
@blp.requires("submitter")
@blp.response(200, CatalogSchema)
def get_catalog() -> Response:
    """List the allowed estimators and transformers with their parameters, and the metrics."""
    document = load_catalog().to_document()
    document.pop("generated_by", None)
    document["metrics"] = [
        {**asdict(spec), "options": [asdict(METRIC_OPTIONS[o]) for o in spec.options],
         "default": name in DEFAULT_METRICS[spec.task]}
        for name, spec in METRICS.items()
    ]
    return json_response(document)
