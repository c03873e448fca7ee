"""Marshmallow schemas of the v1 surface shared by every route: problems, catalog, keys, operations.

Request schemas check shape and types and turn bodies into the core's frozen values (the submission
body becomes a ``config.SubmissionRequest``); what a value means -- a column of the dataset, an
estimator in the catalog, a fold count in range -- is the core's to judge, so each rule lives once.
Response schemas only describe documents for the OpenAPI spec: views send the core's documents
unfiltered, so a field the core adds is never silently dropped.
"""

from __future__ import annotations

from marshmallow import Schema, fields, validate

from service.vocabulary import ROLES, TASKS

_DATETIME = {"format": "date-time"}


# -- errors ---------------------------------------------------------------------------------------

class FieldProblemSchema(Schema):
    pointer = fields.String(metadata={"description": "JSON pointer (RFC 6901) into the request body"})
    detail = fields.String()


class ProblemSchema(Schema):
    """RFC 9457 problem details; ``errors`` lists field problems when there are any."""

    type = fields.String(metadata={"example": "urn:sealfold:problem:invalid-input"})
    title = fields.String()
    status = fields.Integer()
    detail = fields.String()
    errors = fields.List(fields.Nested(FieldProblemSchema))


# -- catalog, keys, operations --------------------------------------------------------------------

class CatalogParamSchema(Schema):
    default = fields.Raw(allow_none=True, metadata={"description": "scikit-learn's default"})
    type = fields.String(metadata={"description": "what scikit-learn accepts, in words"})
    deprecated = fields.Boolean(metadata={"description": "present and true when scikit-learn's docstring marks "
                                                         "the parameter deprecated"})
    library_default = fields.Raw(metadata={"description": "XGBoost: the value a null default stands for"})


class CatalogEntrySchema(Schema):
    name = fields.String(metadata={"description": "scikit-learn class name"})
    kind = fields.String(validate=validate.OneOf(("estimator", "transformer")))
    task = fields.String(validate=validate.OneOf(TASKS), metadata={"description": "estimators only"})
    module = fields.String()
    params = fields.Dict(keys=fields.String(), values=fields.Nested(CatalogParamSchema))
    forced = fields.Dict(metadata={"description": "values the service fixes; a different value is rejected"})
    service_defaults = fields.Dict(metadata={"description": "defaults used instead of scikit-learn's"})
    caps = fields.Dict(keys=fields.String(), values=fields.Dict(), metadata={"description": "upper bounds"})
    linear = fields.Boolean(metadata={"description": "coefficients are recorded per fold"})
    has_predict_proba_by_default = fields.Boolean()
    library = fields.String(metadata={"description": "lightgbm or xgboost for the boosting libraries' classes"})
    constraints = fields.Dict(metadata={"description": "LightGBM / XGBoost: per parameter, the accepted "
                                                       "alternatives the service checks (from their documentation)"})
    withheld = fields.Dict(keys=fields.String(), values=fields.String(), metadata={
        "description": "parameters a submission may not set, each with the reason"})
    restricted = fields.Dict(metadata={"description": "parameters whose values the service narrows: the values "
                                                      "that work here and why"})
    native_categorical = fields.Boolean(metadata={"description": "takes model.categorical_features as categories"})
    nested = fields.Dict(metadata={"description": "parameters holding nested catalog estimators: form one or list"})
    target_functions = fields.Dict(keys=fields.String(), values=fields.String(), metadata={
        "description": "TransformedTargetRegressor: allowed func names, each with its inverse_func"})


class MetricOptionSchema(Schema):
    name = fields.String(metadata={"example": "average"})
    description = fields.String()
    choices = fields.List(fields.String(), metadata={"description": "the accepted words; empty for a value"})
    required = fields.Boolean(metadata={"description": "no default: a submission must declare it"})


class MetricSchema(Schema):
    name = fields.String()
    bounds = fields.List(fields.Float(allow_none=True), metadata={
        "description": "[lowest, highest] value the metric can take, null where unbounded; intervals are "
                       "clipped to it"})
    task = fields.String(validate=validate.OneOf(TASKS))
    greater_is_better = fields.Boolean()
    needs_proba = fields.Boolean()
    description = fields.String()
    default = fields.Boolean(metadata={"description": "used when a submission names no metrics"})
    options = fields.List(fields.Nested(MetricOptionSchema), metadata={
        "description": "choices a submission declares as name(option=value, ...) or {\"name\": ..., option: "
                       "value}; stored spelled out, e.g. f1(average=binary;pos_label=yes)"})
    in_target_units = fields.Boolean(metadata={
        "description": "values are in the target's units (or their square): no default margin fits every dataset"})


class CatalogSchema(Schema):
    """What a submission may name: estimators, transformers and metrics."""

    sklearn_version = fields.String()
    library_versions = fields.Dict(keys=fields.String(), values=fields.String())
    estimators = fields.List(fields.Nested(CatalogEntrySchema))
    transformers = fields.List(fields.Nested(CatalogEntrySchema))
    metrics = fields.List(fields.Nested(MetricSchema))
    caps_note = fields.Dict(keys=fields.String(), values=fields.String())
    value_caps = fields.Dict(keys=fields.String(), values=fields.Integer(), metadata={
        "description": "caps on every parameter value: max_string_length, max_list_items"})


_IDENTITY = ("whose key it is: a person or a CI identity of the team (e.g. an address or a CI job's name). "
             "Holdout budgets are counted per identity and per team, so a second key for an identity adds no "
             "budget. Letters, digits and . _ @ + : -, at most 100, not starting with 'key_'.")


class KeyCreateSchema(Schema):
    team = fields.String(load_default=None, metadata={"description": "default: the caller's team"})
    role = fields.String(required=True, validate=validate.OneOf(ROLES))
    name = fields.String(load_default="", validate=validate.Length(max=200))
    identity = fields.String(load_default=None, validate=validate.Length(min=1, max=100), metadata={
        "description": _IDENTITY + " Default: none, and the key is an identity of its own."})


class KeySchema(Schema):
    id = fields.String()
    team = fields.String()
    role = fields.String(validate=validate.OneOf(ROLES))
    name = fields.String()
    identity = fields.String(allow_none=True, metadata={
        "description": "the identity whose holdout budget the key spends (null: the key is its own)"})


class KeyCreatedSchema(KeySchema):
    token = fields.String(metadata={"description": "shown once; only its hash is stored"})


class HealthSchema(Schema):
    status = fields.String(metadata={"example": "ok"})


class ReadinessSchema(Schema):
    status = fields.String(metadata={"example": "ready"})
    checks = fields.Dict(keys=fields.String(), values=fields.String())
