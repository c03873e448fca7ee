"""Marshmallow schemas of the dataset routes: the registration request and the dataset document.


Request and response schemas divide their work as ``service.api.schemas`` describes.
"""

from __future__ import annotations

from typing import Any

from marshmallow import Schema, fields, pre_load, validate

from service.vault import folds as fold_plans
from service.vault.sealing import HOLDOUT_SCHEMES
from service.vocabulary import TASKS

_DATETIME = {"format": "date-time"}


# -- datasets -------------------------------------------------------------------------------------

class DatasetDeclarationSchema(Schema):
    """What a steward declares about a dataset; omitted options take the server's defaults.

    Only types are checked here; ``service.vault.registration`` judges the values (names a column, in range).
    """

    name = fields.String(required=True, metadata={"maxLength": 200})
    target = fields.String(required=True, metadata={"description": "the column to predict"})
    task = fields.String(required=True, metadata={"enum": list(TASKS)})
    id_column = fields.String(load_default=None, allow_none=True, metadata={
        "description": "unique row ids; the development download's row_id is taken from it"})
    group_column = fields.String(load_default=None, allow_none=True, metadata={
        "description": "rows of one group never straddle holdout and development, nor a fold"})
    time_column = fields.String(load_default=None, allow_none=True, metadata={
        "description": "the latest rows are held out; folds chain forward in time"})
    holdout_fraction = fields.Float(load_default=None, allow_none=True, metadata={
        "description": "default by size: 0.2 under 100k rows, 0.1 from 100k, 0.01 from 1M"})
    holdout_scheme = fields.String(load_default=None, allow_none=True, metadata={
        "enum": list(HOLDOUT_SCHEMES),
        "description": "default: time with a time column, group with a group column, else stratified (on the "
                       "classes, or for regression on quantile bins of the target: deciles, fewer on small "
                       "tables)"})
    folds = fields.Integer(load_default=5, metadata={"minimum": fold_plans.MIN_FOLDS,
                                                     "maximum": fold_plans.MAX_FOLDS})
    fold_scheme = fields.String(load_default=None, allow_none=True, metadata={
        "enum": list(fold_plans.FOLD_SCHEMES),
        "description": "default: time, group, stratified or kfold (shuffled) from the declared columns and "
                       "task; contiguous = unshuffled k-fold in the stored row order"})

    @pre_load
    def _blank_is_omitted(self, data: Any, **_: Any) -> Any:
        # HTML forms and curl -F send "" for a field left empty; that means "not declared".
        if isinstance(data, dict):
            return {k: v for k, v in data.items() if v != ""}
        return data


class DatasetUploadSchema(DatasetDeclarationSchema):
    """multipart/form-data registration: the declaration as form fields plus the file."""

    file = fields.Raw(required=True, metadata={"type": "string", "format": "binary",
                                               "description": "CSV or Parquet, by file name or type"})


class DatasetImportSchema(DatasetDeclarationSchema):
    """JSON registration of a file already on the server, under the configured import root."""

    path = fields.String(required=True, validate=validate.Length(min=1),
                         metadata={"description": "relative to SEALFOLD_IMPORT_ROOT"})


class ColumnSchema(Schema):
    name = fields.String()
    kind = fields.String(validate=validate.OneOf(("numeric", "categorical", "datetime")))
    dtype = fields.String()
    missing = fields.Integer(allow_none=True, metadata={
        "description": "missing values in the development partition; absent on datasets registered before "
                       "they were counted"})


class FoldPlanSchema(Schema):
    scheme = fields.String(validate=validate.OneOf(fold_plans.FOLD_SCHEMES))
    folds = fields.Integer()
    seed = fields.Integer()


class PartitionRowsSchema(Schema):
    total = fields.Integer()
    development = fields.Integer()
    holdout = fields.Integer()


class HoldoutPlanSchema(Schema):
    scheme = fields.String(validate=validate.OneOf(HOLDOUT_SCHEMES))
    fraction = fields.Float()


class ComparedRowsSchema(Schema):
    """Non-missing values compared on each side."""

    development = fields.Integer()
    holdout = fields.Integer()


class BeyondRangeSchema(Schema):
    """Holdout rows above the development maximum and below the development minimum."""

    above = fields.Integer()
    below = fields.Integer()


class BalanceColumnSchema(Schema):
    """One column's comparison of holdout and development rows (holdout minus development)."""

    name = fields.String()
    role = fields.String(validate=validate.OneOf(("feature", "target")))
    kind = fields.String(validate=validate.OneOf(("numeric", "categorical")), metadata={
        "description": "datetime and bool columns are compared as numbers"})
    rows = fields.Nested(ComparedRowsSchema)
    smd = fields.Float(allow_none=True, metadata={
        "description": "numeric: (mean_holdout - mean_development) / sqrt((s_dev^2 + s_holdout^2) / 2)"})
    smd_allowed = fields.Float(allow_none=True, metadata={
        "description": "the larger of the fixed limit and what a chance split would reach"})
    ks = fields.Float(allow_none=True, metadata={"description": "numeric: two-sample Kolmogorov-Smirnov statistic"})
    ks_pvalue = fields.Float(allow_none=True)
    beyond_range = fields.Nested(BeyondRangeSchema, metadata={
        "description": "numeric: holdout rows beyond the development range; a long tail sealed away shows here"})
    beyond_range_pvalue = fields.Float(metadata={
        "description": "numeric: chance a random split seals that many of the most extreme values (worse side, x2)"})
    missing_tv = fields.Float(allow_none=True, metadata={
        "description": "numeric with missing values: difference of the missing shares"})
    missing_pvalue = fields.Float(allow_none=True)
    levels = fields.Integer(metadata={"description": "categorical: levels compared (rare ones pooled)"})
    tv = fields.Float(allow_none=True, metadata={
        "description": "categorical: total-variation distance of the level frequencies, 1/2 sum |p - q|"})
    pvalue = fields.Float(metadata={"description": "categorical: chi-square test of homogeneity"})
    exceeds = fields.List(fields.String(), metadata={"description": "statistics out of balance"})


class AdversarialSchema(Schema):
    auc = fields.Float(metadata={"description": "cross-validated AUC of telling holdout rows from development rows"})
    pvalue = fields.Float(metadata={"description": "one-sided, against chance (AUC 0.5)"})
    rows = fields.Integer(metadata={"description": "rows the classifier saw (a sample on big tables)"})
    holdout_rows = fields.Integer()
    features = fields.Integer()
    folds = fields.Integer()
    exceeds = fields.Boolean()


class BalanceExceededSchema(Schema):
    column = fields.String(allow_none=True, metadata={"description": "null for the adversarial AUC"})
    statistic = fields.String()
    value = fields.Float(allow_none=True)


class BalanceDrawSchema(Schema):
    draw = fields.Integer()
    balanced = fields.Boolean()
    adversarial_auc = fields.Float(allow_none=True)
    exceeded = fields.List(fields.Nested(BalanceExceededSchema))


class SealMethodSchema(Schema):
    scheme = fields.String()
    version = fields.Integer(metadata={"description": "2: regression strata include bins of their own for each "
                                                      "tail of the target"})


class BalanceSchema(Schema):
    """How well the sealed holdout matches the development partition.

    Everyone reads balanced, adversarial_auc and draws; the other fields are shown to stewards only.
    Aggregate statistics only: never rows, row ids or the sealing seed.
    """

    balanced = fields.Boolean(metadata={"description": "no statistic beyond its limit in the kept draw"})
    adversarial_auc = fields.Float(allow_none=True, metadata={
        "description": "about 0.5: a classifier cannot tell holdout rows from development rows"})
    draws = fields.Integer(metadata={"description": "draws of the seal; one out of balance is redrawn"})
    chosen_draw = fields.Integer(metadata={"description": "stewards: the draw that was kept"})
    redrawable = fields.Boolean(metadata={"description": "stewards: false for a time holdout (no seed)"})
    columns = fields.List(fields.Nested(BalanceColumnSchema), metadata={"description": "stewards"})
    adversarial = fields.Nested(AdversarialSchema, allow_none=True, metadata={"description": "stewards"})
    excluded = fields.List(fields.String(), metadata={"description": "stewards: id, group and time columns"})
    limits = fields.Dict(metadata={"description": "stewards: the limits the draws were held to"})
    attempts = fields.List(fields.Nested(BalanceDrawSchema), metadata={"description": "stewards: every draw"})
    seal = fields.Nested(SealMethodSchema, metadata={
        "description": "stewards: the sealing scheme and its version (absent on datasets sealed before versions)"})


class RegistrationWarningSchema(Schema):
    """One warning about undeclared structure, with its figures."""

    kind = fields.String(validate=validate.OneOf(("group", "order", "time_column")))
    detail = fields.String(metadata={"description": "what was found and what to declare"})
    column = fields.String(metadata={"description": "group, time_column: the column"})
    score = fields.String(metadata={"description": "group: r2 (regression) or accuracy (classification)"})
    rows_compared = fields.Integer(metadata={"description": "group: development rows in the sample"})
    values = fields.Integer(metadata={"description": "group: distinct values of the column"})
    random_folds = fields.Float(metadata={"description": "group: 1-NN score, rows of one value on both sides"})
    group_folds = fields.Float(metadata={"description": "group: 1-NN score, whole values per fold"})
    gap = fields.Float(metadata={"description": "group: random_folds - group_folds"})
    statistic = fields.String(metadata={"description": "order: lag1_autocorrelation or same_class_excess"})
    value = fields.Float(metadata={"description": "order: the statistic in file order"})
    z = fields.Float(metadata={"description": "order: against a random order"})


class DatasetSchema(Schema):
    """A dataset's public record: never the sealing seed, holdout rows or the holdout's fingerprint."""

    id = fields.String()
    team = fields.String()
    name = fields.String()
    task = fields.String(validate=validate.OneOf(TASKS))
    target = fields.String()
    id_column = fields.String(allow_none=True)
    group_column = fields.String(allow_none=True)
    time_column = fields.String(allow_none=True)
    columns = fields.List(fields.Nested(ColumnSchema))
    classes = fields.List(fields.String(), allow_none=True)
    rows = fields.Nested(PartitionRowsSchema)
    holdout = fields.Nested(HoldoutPlanSchema)
    fold_plan = fields.Nested(FoldPlanSchema)
    balance = fields.Nested(BalanceSchema, allow_none=True)
    warnings = fields.List(fields.Nested(RegistrationWarningSchema), allow_none=True, metadata={
        "description": "structure the declaration did not name, found on the development rows: a column that "
                       "looks like groups, rows in time order (null on datasets registered before these checks)"})
    fingerprint = fields.String(metadata={"description": (
        "Pins the registered data: SHA-256 of the development fingerprint and a keyed hash (HMAC, server-side "
        "key) of the holdout's, so it changes with any holdout value but cannot be recomputed from rows")})
    development_fingerprint = fields.String(metadata={
        "description": "SHA-256 of the development partition (row_id first) in the canonical serialisation"})
    created_by = fields.String()
    created_at = fields.String(metadata=_DATETIME)


class DatasetListSchema(Schema):
    datasets = fields.List(fields.Nested(DatasetSchema))
