"""The resolved configuration of a submission, as one frozen value, and its stored document.

``service.submission.config.resolve`` produces a ``ResolvedConfig``; the records DB stores its
``to_document()`` (the ``config`` column) and the check job receives the same document; every job
reads it back with ``ResolvedConfig.from_document``. The document's keys and values are the
service's stored format, so a value and its document always say the same thing. Reading is lenient
where documents stored before a key existed lack it: ``repeats`` is then 1, ``plan_overridden``
false, ``search`` null, and a model's ``params`` and ``preprocess`` empty.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from service.vault.folds import FoldPlan


@dataclass(frozen=True)
class PreprocessStep:
    """One transformer applied to some columns inside every training fold."""

    transformer: str
    columns: tuple[str, ...]
    params: Mapping[str, Any] = field(default_factory=dict)

    def to_document(self) -> dict[str, Any]:
        """Return the step as stored in a configuration document."""
        return {"transformer": self.transformer, "columns": list(self.columns), "params": dict(self.params)}

    @classmethod
    def from_document(cls, document: Mapping[str, Any]) -> PreprocessStep:
        """Rebuild a step from its stored document."""
        return cls(str(document["transformer"]), tuple(document["columns"]), dict(document.get("params") or {}))


@dataclass(frozen=True)
class SearchSpec:
    """A small hyper-parameter search run inside every outer training fold (nested cross-validation).

    ``grid``: parameter -> list of values (every combination); or ``distributions`` with ``n_iter``
    draws: parameter -> list of values to sample from, or {"uniform"|"log_uniform": [low, high]}.
    """

    grid: Mapping[str, tuple[Any, ...]] | None = None
    distributions: Mapping[str, Any] | None = None
    n_iter: int | None = None
    inner_folds: int = 3

    def to_document(self) -> dict[str, Any]:
        """Return the search as stored in a configuration document."""
        return {
            "grid": None if self.grid is None else {k: list(v) for k, v in self.grid.items()},
            "distributions": None if self.distributions is None else dict(self.distributions),
            "n_iter": self.n_iter, "inner_folds": self.inner_folds,
        }

    @classmethod
    def from_document(cls, document: Mapping[str, Any]) -> SearchSpec:
        """Rebuild a search from its stored document."""
        grid, distributions = document["grid"], document["distributions"]
        return cls(
            grid=None if grid is None else {k: tuple(v) for k, v in grid.items()},
            distributions=None if distributions is None else dict(distributions),
            n_iter=document["n_iter"], inner_folds=int(document["inner_folds"]),
        )


@dataclass(frozen=True)
class ResolvedModel:
    """The estimator, its parameters, the features it sees (always named) and their preprocessing.

    ``categorical_features``: the columns an estimator with native categorical support takes as
    categories, by name (left out of the document when empty, so earlier fingerprints stand).
    """

    estimator: str
    params: Mapping[str, Any]
    features: tuple[str, ...]
    preprocess: tuple[PreprocessStep, ...] = ()
    categorical_features: tuple[str, ...] = ()

    def to_document(self) -> dict[str, Any]:
        """Return the model part of a configuration document."""
        document: dict[str, Any] = {
            "estimator": self.estimator, "params": dict(self.params), "features": list(self.features),
            "preprocess": [step.to_document() for step in self.preprocess],
        }
        if self.categorical_features:
            document["categorical_features"] = list(self.categorical_features)
        return document

    @classmethod
    def from_document(cls, document: Mapping[str, Any]) -> ResolvedModel:
        """Rebuild the model part from its stored document."""
        return cls(
            estimator=str(document["estimator"]), params=dict(document.get("params") or {}),
            features=tuple(document["features"]),
            preprocess=tuple(PreprocessStep.from_document(s) for s in document.get("preprocess") or []),
            categorical_features=tuple(document.get("categorical_features") or ()),
        )


@dataclass(frozen=True)
class ValidationPlan:
    """The cross-validation a submission runs: the dataset's fold plan or its own folds, repeats and options.

    ``test`` is "5x2cv" for Dietterich's 5x2cv paired t-test (else None); ``learning_curve`` the
    fractions of each training fold to refit on, when asked for.
    """

    scheme: str
    folds: int
    seed: int
    repeats: int = 1
    plan_overridden: bool = False
    test: str | None = None
    learning_curve: tuple[float, ...] | None = None

    def fold_plan(self) -> FoldPlan:
        """Return the fold plan (scheme, folds, seed) the vault cuts this plan's folds with."""
        return FoldPlan(scheme=self.scheme, folds=self.folds, seed=self.seed)

    def to_document(self) -> dict[str, Any]:
        """Return the ``validation`` part of a configuration document; unset options are left out."""
        document: dict[str, Any] = {
            "scheme": self.scheme, "folds": self.folds, "seed": self.seed, "repeats": self.repeats,
            "plan_overridden": self.plan_overridden,
        }
        if self.test is not None:
            document["test"] = self.test
        if self.learning_curve is not None:
            document["learning_curve"] = list(self.learning_curve)
        return document

    @classmethod
    def from_document(cls, document: Mapping[str, Any]) -> ValidationPlan:
        """Rebuild the plan from its stored document."""
        curve = document.get("learning_curve")
        return cls(
            scheme=str(document["scheme"]), folds=int(document["folds"]), seed=int(document["seed"]),
            repeats=int(document.get("repeats", 1)), plan_overridden=bool(document.get("plan_overridden", False)),
            test=document.get("test"), learning_curve=None if curve is None else tuple(curve),
        )


@dataclass(frozen=True)
class ResolvedConfig:
    """A submission's configuration as the service resolved it: defaults filled in, the fold plan fixed.

    ``linear`` is None until a worker has checked the configuration (the check says whether the
    estimator is linear, so its coefficients are kept); it is set, with ``dataclasses.replace``,
    before the configuration is stored.
    """

    model: ResolvedModel
    validation: ValidationPlan
    metrics: tuple[str, ...]
    search: SearchSpec | None
    label: str
    task: str
    target: str
    linear: bool | None = None

    def to_document(self) -> dict[str, Any]:
        """Return the configuration document stored with the submission and sent to the check job."""
        document: dict[str, Any] = {
            "model": self.model.to_document(),
            "validation": self.validation.to_document(),
            "metrics": list(self.metrics),
            "search": None if self.search is None else self.search.to_document(),
            "label": self.label,
            "task": self.task,
            "target": self.target,
        }
        if self.linear is not None:
            document["linear"] = self.linear
        return document

    @classmethod
    def from_document(cls, document: Mapping[str, Any]) -> ResolvedConfig:
        """Rebuild a configuration from its stored document."""
        search, linear = document.get("search"), document.get("linear")
        return cls(
            model=ResolvedModel.from_document(document["model"]),
            validation=ValidationPlan.from_document(document["validation"]),
            metrics=tuple(document["metrics"]),
            search=None if search is None else SearchSpec.from_document(search),
            label=str(document["label"]),
            task=str(document["task"]),
            target=str(document["target"]),
            linear=None if linear is None else bool(linear),
        )
