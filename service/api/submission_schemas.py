"""Marshmallow schemas of the submission routes: the request, its query, and the submission document.


Request and response schemas divide their work as ``service.api.schemas`` describes.
"""

from __future__ import annotations

from typing import Any

from marshmallow import EXCLUDE, Schema, ValidationError, fields, post_load, validate, validates_schema

from service.submission.config import (
    LEARNING_CURVE_DEFAULT,
    MAX_CANDIDATES,
    MAX_FOLDS,
    MAX_INNER_FOLDS,
    MAX_REPEATS,
    DatasetRef,
    ModelSpec,
    PreprocessStep,
    SearchSpec,
    SubmissionRequest,
    ValidationSpec,
)
from service.vault import folds as fold_plans
from service.vocabulary import DECISIONS, FAILURE_CAUSES, RELEASE_MODES, RULE_OUTCOMES, STATES

_DATETIME = {"format": "date-time"}


# -- submissions: request -------------------------------------------------------------------------

class DatasetPinSchema(Schema):
    id = fields.String(required=True)
    fingerprint = fields.String(required=True)


class DatasetRefField(fields.Field[DatasetRef]):
    """``"ds_..."`` or ``{"id": "ds_...", "fingerprint": "..."}`` (pins the exact data)."""

    def _deserialize(self, value: Any, attr: str | None, data: Any, **kwargs: Any) -> DatasetRef:
        if isinstance(value, str) and value:
            return DatasetRef(value)
        if isinstance(value, dict):
            pin = DatasetPinSchema().load(value)
            return DatasetRef(pin["id"], pin["fingerprint"])
        raise ValidationError(f"dataset must be an id such as 'ds_...' or an object with id and "
                              f"fingerprint, got {value!r}")


class MetricField(fields.Field[Any]):
    """A metric: a name or key (``"f1(average=weighted)"``) or an object ``{"name": ..., options}``.

    Only the shape is checked here; names and options are resolved against the dataset
    (``service.catalog.metric_keys``), which answers every problem at ``/metrics/<i>``.
    """

    def _deserialize(self, value: Any, attr: str | None, data: Any, **kwargs: Any) -> Any:
        if isinstance(value, str) and value.strip():
            return value
        if isinstance(value, dict) and isinstance(value.get("name"), str):
            return dict(value)
        raise ValidationError(f"a metric is a name such as 'f1' or 'f1(average=weighted)', or an object with a "
                              f"name and its options such as {{\"name\": \"pinball_loss\", \"alpha\": 0.9}}, "
                              f"got {value!r}")


class PreprocessStepSchema(Schema):
    transformer = fields.String(required=True, metadata={"example": "StandardScaler"})
    columns = fields.List(fields.String(), required=True)
    params = fields.Dict(keys=fields.String(), load_default=dict)


class ModelSchema(Schema):
    estimator = fields.String(required=True, metadata={"example": "Ridge"})
    params = fields.Dict(keys=fields.String(), load_default=dict, metadata={"example": {"alpha": 1.0}})
    features = fields.List(fields.String(), load_default=None, allow_none=True, metadata={
        "description": "default: every column except target, id, group and time columns"})
    preprocess = fields.List(fields.Nested(PreprocessStepSchema), load_default=list)
    categorical_features = fields.List(fields.String(), load_default=list, metadata={
        "description": "categorical columns the estimator takes as categories itself (LightGBM, XGBoost, "
                       "HistGradientBoosting*), by name; they need no encoder step",
        "example": ["depot"]})


class ValidationOptionsSchema(Schema):
    folds = fields.Integer(strict=True, load_default=None, allow_none=True, metadata={
        "minimum": 2, "maximum": MAX_FOLDS, "description": "default: the dataset's fold plan"})
    repeats = fields.Integer(strict=True, load_default=1, metadata={"minimum": 1, "maximum": MAX_REPEATS})
    test = fields.String(load_default=None, allow_none=True, metadata={
        "enum": ["5x2cv"], "description": "5x2cv: five repeats of 2-fold CV compared by Dietterich's (1998) "
                                          "paired t-test, for small data; overrides folds and repeats"})
    learning_curve = fields.List(fields.Float(allow_nan=False), load_default=None, allow_none=True, metadata={
        "description": "fractions in (0, 1] of each training fold, increasing: CV scores at each training size "
                       "(the first n of a seeded shuffle of the training rows, as scikit-learn's "
                       "learning_curve(shuffle=True)); an empty list means "
                       f"{list(LEARNING_CURVE_DEFAULT)}", "example": [0.1, 0.5, 1.0]})


class SearchOptionsSchema(Schema):
    """A small hyper-parameter search run inside every outer training fold (nested cross-validation)."""

    grid = fields.Dict(keys=fields.String(), values=fields.Raw(), load_default=None,
                       allow_none=True, metadata={"description": "estimator parameter -> values; every "
                                                  "combination is tried (GridSearchCV)",
                                                  "example": {"alpha": [0.1, 1, 10]}})
    distributions = fields.Dict(keys=fields.String(), values=fields.Raw(), load_default=None, allow_none=True,
                                metadata={"description": "estimator parameter -> a list of values, or "
                                          "{\"uniform\": [low, high]} / {\"log_uniform\": [low, high]}; n_iter "
                                          "draws (RandomizedSearchCV with a fixed seed)"})
    n_iter = fields.Integer(strict=True, load_default=None, allow_none=True, metadata={
        "minimum": 1, "maximum": MAX_CANDIDATES})
    inner_folds = fields.Integer(strict=True, load_default=3, metadata={"minimum": 2, "maximum": MAX_INNER_FOLDS})

    @validates_schema
    def _grid_values_are_lists(self, data: dict[str, Any], **_: Any) -> None:
        wrong = {name: [f"grid values must be a list, got {values!r}"]
                 for name, values in (data.get("grid") or {}).items() if not isinstance(values, list)}
        if wrong:
            raise ValidationError({"grid": wrong})


class SubmissionRequestSchema(Schema):
    """A model configuration to review: declarative, never code."""

    dataset = DatasetRefField(required=True, metadata={"oneOf": [
        {"type": "string", "example": "ds_0123456789abcdef0123"},
        {"type": "object", "required": ["id", "fingerprint"],
         "properties": {"id": {"type": "string"}, "fingerprint": {"type": "string"}}},
    ]})
    model = fields.Nested(ModelSchema, required=True)
    validation = fields.Nested(ValidationOptionsSchema,
                               load_default=lambda: {"folds": None, "repeats": 1, "test": None})
    metrics = fields.List(MetricField(metadata={"oneOf": [
        {"type": "string", "example": "f1(average=weighted)"},
        {"type": "object", "required": ["name"], "additionalProperties": True,
         "properties": {"name": {"type": "string", "example": "pinball_loss"}},
         "example": {"name": "pinball_loss", "alpha": 0.9}},
    ]}), load_default=None, allow_none=True, metadata={
        "description": "default: the task's default metrics; see GET /v1/catalog. A metric with choices is "
                       "named with them, 'f1(average=weighted)', or as an object {\"name\": \"f1\", \"average\": "
                       "\"weighted\"}; the stored configuration spells out every choice"})
    label = fields.String(load_default="", validate=validate.Length(max=200))
    search = fields.Nested(SearchOptionsSchema, load_default=None, allow_none=True, metadata={
        "description": "nested search: each outer fold tunes on its training rows only, scored by the first "
                       "metric; the holdout job refits the search on every development row"})

    @post_load
    def _to_request(self, data: dict[str, Any], **_: Any) -> SubmissionRequest:
        model = data["model"]
        return SubmissionRequest(
            dataset=data["dataset"],
            model=ModelSpec(
                estimator=model["estimator"],
                params=model["params"],
                features=None if model["features"] is None else tuple(model["features"]),
                preprocess=tuple(
                    PreprocessStep(s["transformer"], tuple(s["columns"]), s["params"])
                    for s in model["preprocess"]
                ),
                categorical_features=tuple(model["categorical_features"]),
            ),
            validation=ValidationSpec(data["validation"]["folds"], data["validation"]["repeats"],
                                      data["validation"].get("test"), _curve(data["validation"])),
            metrics=None if data["metrics"] is None else tuple(data["metrics"]),
            label=data["label"],
            search=_search(data.get("search")),
        )


def _curve(validation: dict[str, Any]) -> tuple[float, ...] | None:
    sizes = validation.get("learning_curve")
    return None if sizes is None else tuple(float(v) for v in sizes)


def _search(search: dict[str, Any] | None) -> SearchSpec | None:
    if search is None:
        return None
    grid = search["grid"]
    return SearchSpec(
        grid=None if grid is None else {k: tuple(v) for k, v in grid.items()},
        distributions=search["distributions"], n_iter=search["n_iter"], inner_folds=search["inner_folds"],
    )


class SubmissionListQuerySchema(Schema):
    class Meta:
        unknown = EXCLUDE

    limit = fields.Integer(load_default=50, validate=validate.Range(1, 200))
    cursor = fields.String(load_default=None, metadata={"description": "next_cursor of the previous page"})
    dataset = fields.String(load_default=None, metadata={"description": "only submissions on this dataset"})


# -- submissions: response ------------------------------------------------------------------------

class ProgressSchema(Schema):
    folds_done = fields.Integer()
    folds_total = fields.Integer()


class MetricSummarySchema(Schema):
    n = fields.Integer(metadata={"description": "the folds whose score is defined: the folds summarised"})
    undefined = fields.Integer(metadata={
        "description": "candidate only: succeeded folds where the metric is undefined (null), left out"})
    mean = fields.Float()
    std = fields.Float()
    min = fields.Float()
    max = fields.Float()
    naive_interval_95 = fields.List(fields.Float(), metadata={
        "description": "treats folds as independent, which they are not: read it as too narrow; its ends "
                       "are clipped to the metric's range (the catalog's bounds)"})
    clipped = fields.Boolean(metadata={
        "description": "an end of naive_interval_95 lay outside the metric's range and was moved to its edge"})


class FoldScoreSchema(Schema):
    fold = fields.Integer()
    repeat = fields.Integer()
    status = fields.String(validate=validate.OneOf(("ok", "failed")))
    train_rows = fields.Integer()
    test_rows = fields.Integer()
    scores = fields.Dict(keys=fields.String(), values=fields.Float(), allow_none=True)
    undefined = fields.Dict(keys=fields.String(), values=fields.String(), metadata={
        "description": "per metric whose score is null on this fold (e.g. roc_auc on test rows of one class): why"})
    baseline_scores = fields.Dict(keys=fields.String(), values=fields.Float(), allow_none=True)
    fit_seconds = fields.Float(allow_none=True)
    score_seconds = fields.Float(allow_none=True)
    error = fields.String(metadata={"description": "failed folds only: the estimator's message"})
    train_scores = fields.Dict(keys=fields.String(), values=fields.Float(allow_none=True), metadata={
        "description": "the same metrics on the fold's training rows (cross_validate's return_train_score); "
                       "above 100,000 training rows, on a seeded random sample of about 100,000 of them"})
    train_scored_rows = fields.Integer(metadata={
        "description": "how many training rows train_scores were computed on (train_rows, or the sample's size)"})
    curve = fields.List(fields.Dict(), metadata={
        "description": "learning curve: per size, fraction, train_rows, train_scores (on train_scored_rows of "
                       "them) and scores"})
    search = fields.Dict(metadata={"description": "nested search: best_params, best_inner_score, scoring"})


class CrossValidationSchema(Schema):
    folds = fields.List(fields.Nested(FoldScoreSchema))
    summary = fields.Dict(keys=fields.String(), values=fields.Nested(MetricSummarySchema), allow_none=True)
    failures = fields.List(fields.Dict())


class BaselineSchema(Schema):
    estimator = fields.String()
    summary = fields.Dict(keys=fields.String(), values=fields.Nested(MetricSummarySchema))


class LadderReadingSchema(Schema):
    """What a ladder figure is: the dataset's best holdout figure so far, and whether this submission set it."""

    metric = fields.String()
    new_best = fields.Boolean(metadata={"description": "true when this submission moved the ladder"})
    best_so_far = fields.Float(metadata={"description": "the dataset's best holdout figure so far, as released"})
    held_by = fields.String(allow_none=True, metadata={
        "description": "the submission that set it (its own document says so)"})


class HoldoutResultSchema(Schema):
    """Only what the release policy released, once: never the raw score, rows or predictions."""

    released = fields.Boolean()
    mode = fields.String(allow_none=True, validate=validate.OneOf(RELEASE_MODES),
                         metadata={"description": "null until the holdout job ran"})
    scores = fields.Dict(keys=fields.String(), values=fields.Float(), allow_none=True)
    withheld_until = fields.String(allow_none=True, metadata={
        **_DATETIME, "description": "when withheld: when the submitter's release budget returns"})
    note = fields.String(allow_none=True)
    policy_version = fields.Integer(allow_none=True, metadata={"description": "the policy it was released under"})
    ladder = fields.Nested(LadderReadingSchema, allow_none=True, metadata={
        "description": "under the ladder: the figure is the dataset's best so far, which this submission may not hold"})
    summary = fields.String(metadata={"description": "one plain sentence on what the holdout figure is"})
    late = fields.Boolean(metadata={"description": (
        "true when the verdict came after its prompt time because of the step on the holdout rows: that it came "
        "late is itself an answer about those rows, so it spent one more unit of the holdout budget")})


class VerdictRuleSchema(Schema):
    rule = fields.String(validate=validate.OneOf(
        ("baseline", "bar", "champion", "champion_holdout", "holdout_gap", "fold_stability")))
    outcome = fields.String(validate=validate.OneOf(RULE_OUTCOMES))
    sentence = fields.String()
    figures = fields.Dict()


class VerdictSchema(Schema):
    decision = fields.String(validate=validate.OneOf(DECISIONS))
    reasons = fields.List(fields.String(), metadata={"description": "one sentence per rule, failures first"})
    rules = fields.List(fields.Nested(VerdictRuleSchema))
    primary_metric = fields.String()
    test = fields.String(validate=validate.OneOf(("corrected_resampled_t", "five_by_two_cv")))
    policy_version = fields.Integer(metadata={"description": "the policy version it was judged under"})
    champion = fields.String(allow_none=True, metadata={"description": "the champion compared with"})


class ProvenanceSchema(Schema):
    dataset_fingerprint = fields.String()
    config_fingerprint = fields.String()
    fold_plan = fields.Dict()
    versions = fields.Dict(keys=fields.String(), values=fields.String())


class ReliabilityBinSchema(Schema):
    low = fields.Float()
    high = fields.Float()
    count = fields.Integer(metadata={"description": "out-of-fold predictions in the bin, over every fold"})
    mean_predicted = fields.Float(allow_none=True, metadata={"description": "null for an empty bin"})
    fraction_observed = fields.Float(allow_none=True, metadata={
        "description": "positive_class: the fraction of the bin's rows of that class; top_label: the fraction "
                       "whose most probable class was right"})


class CalibrationSchema(Schema):
    """The reliability of the candidate's predicted probabilities, pooled over the out-of-fold predictions."""

    kind = fields.String(validate=validate.OneOf(("positive_class", "top_label")), metadata={
        "description": "two classes: the probability of positive_class; more: the largest probability of a row"})
    positive_class = fields.String(allow_none=True)
    binning = fields.String(metadata={"description": "the bins, in words"})
    rows = fields.Integer(metadata={"description": "out-of-fold predictions pooled (each row once per repeat)"})
    curve = fields.List(fields.Nested(ReliabilityBinSchema))
    ece = fields.Float(allow_none=True, metadata={
        "description": "expected calibration error on those bins: sum of (bin rows / rows) * |observed - predicted|"})
    folds = fields.List(fields.Dict(), metadata={
        "description": "per fold: repeat, fold, its points [mean_predicted, fraction_observed, count] per non-empty "
                       "bin, and its ece"})


class SubmissionResultSchema(Schema):
    cv = fields.Nested(CrossValidationSchema)
    coefficients = fields.Dict(allow_none=True, metadata={
        "description": "linear models: per-fold coefficients with their mean and spread"})
    fit_gap = fields.Dict(allow_none=True, metadata={
        "description": "per metric: train mean, validation mean, gap and a plain reading (evidence, not a rule)"})
    learning_curve = fields.List(fields.Dict(), allow_none=True, metadata={
        "description": "per training size: mean train and validation scores over the folds"})
    learning_curve_note = fields.String(allow_none=True, metadata={
        "description": "which training rows each size uses: a seeded shuffle of each training fold"})
    search = fields.Dict(allow_none=True, metadata={
        "description": "nested search: how often each value was chosen, the naive best inner score mean beside "
                       "the nested estimate"})
    calibration = fields.Nested(CalibrationSchema, allow_none=True, metadata={
        "description": "classification with probabilities: the reliability curve of the out-of-fold predictions"})
    baseline = fields.Nested(BaselineSchema, allow_none=True)
    holdout = fields.Nested(HoldoutResultSchema, allow_none=True)
    verdict = fields.Nested(VerdictSchema, allow_none=True)
    provenance = fields.Nested(ProvenanceSchema, allow_none=True)


class ResolvedValidationSchema(Schema):
    scheme = fields.String(validate=validate.OneOf(fold_plans.FOLD_SCHEMES))
    folds = fields.Integer()
    seed = fields.Integer()
    repeats = fields.Integer()
    plan_overridden = fields.Boolean(metadata={"description": "folds differ from the dataset's fold plan"})
    learning_curve = fields.List(fields.Float(), metadata={"description": "when asked for: the training sizes"})


class ResolvedConfigSchema(Schema):
    """The configuration as the service resolved it: defaults filled in, the fold plan fixed."""

    model = fields.Nested(ModelSchema)
    validation = fields.Nested(ResolvedValidationSchema)
    metrics = fields.List(fields.String())
    search = fields.Dict(metadata={"description": "when asked for: the nested search as resolved"})


class SubmissionWarningSchema(Schema):
    """Something the results should be read with; it does not stop the submission."""

    code = fields.String(validate=validate.OneOf(("class_missing_from_training",)))
    detail = fields.String()
    folds = fields.List(fields.Dict(), metadata={
        "description": "class_missing_from_training: per fold, repeat, fold and missing_classes"})


class ResubmissionSchema(Schema):
    """Only in the answer to a POST of a configuration the team already submitted on the same data."""

    submission = fields.String(metadata={"description": "the earlier submission answered instead"})
    judged_under_policy_version = fields.Integer(allow_none=True, metadata={
        "description": "the policy version its verdict was judged under; null while it has no verdict"})
    policy_version_in_force = fields.Integer()
    judged_under_policy_in_force = fields.Boolean(allow_none=True)
    label_sent = fields.String(metadata={"description": "the label of this request, which is not kept"})
    label_kept = fields.String()
    message = fields.String(metadata={"description": "one plain paragraph, saying how to re-judge when the "
                                                     "verdict is from an older policy"})


class SubmissionSchema(Schema):
    """A submission: its state, progress and, once computed, its result."""

    id = fields.String()
    dataset = fields.String()
    state = fields.String(validate=validate.OneOf(STATES))
    label = fields.String()
    progress = fields.Nested(ProgressSchema)
    created_at = fields.String(metadata=_DATETIME)
    started_at = fields.String(allow_none=True, metadata=_DATETIME)
    finished_at = fields.String(allow_none=True, metadata=_DATETIME)
    error = fields.String(allow_none=True, metadata={"description": "why a failed submission failed, in words"})
    failure_cause = fields.String(allow_none=True, validate=validate.OneOf(FAILURE_CAUSES), metadata={
        "description": "null unless failed. model: the estimator raised on every fold (the submission's result); "
                       "timeout, memory_limit: a fold or the holdout exceeded a bound (not retried); missing_data: "
                       "the dataset's files could not be read on the workers that tried; crash: a job died or was "
                       "lost on every attempt; data: the sealed holdout failed its fingerprint check. Apart from "
                       "model, the work did not happen and no verdict is given"})
    warnings = fields.List(fields.Nested(SubmissionWarningSchema), metadata={
        "description": "what the submitter is warned of at submission (empty when nothing)"})
    config = fields.Nested(ResolvedConfigSchema)
    config_fingerprint = fields.String()
    result = fields.Nested(SubmissionResultSchema, allow_none=True)
    resubmission = fields.Nested(ResubmissionSchema, metadata={
        "description": "only when this POST named a configuration the team already submitted"})


class SubmissionListSchema(Schema):
    submissions = fields.List(fields.Nested(SubmissionSchema))
    next_cursor = fields.String(allow_none=True, metadata={"description": "absent or null on the last page"})


class FoldTestRowsSchema(Schema):
    fold = fields.Integer()
    repeat = fields.Integer()
    test_row_ids = fields.List(fields.String(), metadata={"description": "development row_id values"})


class FoldRowsSchema(Schema):
    folds = fields.List(fields.Nested(FoldTestRowsSchema))
