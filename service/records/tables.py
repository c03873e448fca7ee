"""The records schema. JSON columns hold small documents; nothing here holds holdout rows.

A change here needs a revision in ``migrations/versions`` (DEVELOPERS.md); a test compares the two.
"""

from __future__ import annotations

from sqlalchemy import (
    JSON,
    Boolean,
    Column,
    DateTime,
    Float,
    ForeignKey,
    Index,
    Integer,
    MetaData,
    String,
    Table,
    Text,
    UniqueConstraint,
)

metadata = MetaData()

api_keys = Table(
    "api_keys",
    metadata,
    Column("id", String(40), primary_key=True),
    Column("team", String(100), nullable=False),
    Column("role", String(20), nullable=False),
    Column("name", String(200), nullable=False, default=""),
    Column("token_hash", String(64), nullable=False, unique=True),
    Column("created_at", DateTime(timezone=True), nullable=False),
    Column("revoked_at", DateTime(timezone=True)),
    # Whose key it is (a person or a CI identity, within the team): holdout budgets are counted per
    # identity, so minting another key for it adds none. Null: the key is its own identity (its id).
    Column("identity", String(100)),
    Index("ix_api_keys_identity", "team", "identity"),
)

datasets = Table(
    "datasets",
    metadata,
    Column("id", String(40), primary_key=True),
    Column("team", String(100), nullable=False, index=True),
    Column("name", String(200), nullable=False),
    Column("task", String(20), nullable=False),
    Column("target", String(200), nullable=False),
    Column("id_column", String(200)),
    Column("group_column", String(200)),
    Column("time_column", String(200)),
    Column("columns", JSON, nullable=False),  # [{"name", "kind", "dtype"}]
    Column("classes", JSON),  # classification: sorted class labels as strings
    Column("rows_total", Integer, nullable=False),
    Column("rows_development", Integer, nullable=False),
    Column("rows_holdout", Integer, nullable=False),
    Column("holdout_scheme", String(20), nullable=False),
    Column("holdout_fraction", Float, nullable=False),
    Column("sealing_seed", String(40), nullable=False),  # never leaves the service
    Column("fold_plan", JSON, nullable=False),  # {"scheme", "folds", "seed"}
    Column("fingerprint", String(64), nullable=False),  # whole registered table
    Column("development_fingerprint", String(64), nullable=False),
    Column("holdout_fingerprint", String(64), nullable=False),  # checked at every use of the seal
    # How well the holdout matches the development rows, and each draw of the seal: aggregate
    # statistics only (vault.balance), never rows, ids or seeds. Null on records from before it.
    Column("balance", JSON),
    # Registration warnings about undeclared structure (vault.structure): [{"kind", "detail", figures}].
    # Computed on development rows only. Null on records from before it.
    Column("warnings", JSON),
    Column("created_by", String(40), nullable=False),
    Column("created_at", DateTime(timezone=True), nullable=False),
)

submissions = Table(
    "submissions",
    metadata,
    Column("id", String(40), primary_key=True),
    Column("team", String(100), nullable=False),
    Column("dataset_id", ForeignKey("datasets.id"), nullable=False),
    Column("owner_key_id", String(40), nullable=False),
    Column("label", String(200), nullable=False, default=""),
    Column("state", String(20), nullable=False),
    Column("config", JSON, nullable=False),  # the normalised configuration document
    Column("config_fingerprint", String(64), nullable=False),
    Column("folds_total", Integer, nullable=False),
    Column("idempotency_key", String(200)),
    Column("request_fingerprint", String(64)),
    Column("error", Text),
    Column("failure_cause", String(20)),  # why a failed submission failed (service.vocabulary.FAILURE_CAUSES)
    Column("warnings", JSON),  # what the submitter was warned of at submission, e.g. folds that lack a class
    Column("cv_summary", JSON),  # the cross-validation summary once computed (without holdout scores)
    Column("summarized_at", DateTime(timezone=True)),  # when cv_summary was stored
    Column("verdict", JSON),  # the review gate's decision, reasons and rule figures
    Column("policy_version", Integer),  # the policy version the verdict was judged under
    Column("champion_id", String(40)),  # the champion in force when judged (None: there was none)
    Column("created_at", DateTime(timezone=True), nullable=False),
    Column("started_at", DateTime(timezone=True)),
    Column("finished_at", DateTime(timezone=True)),
    # When a verdict that read the holdout may be shown: a time fixed from public figures (service.gate.timing),
    # so what a submitter reads does not tell how long the holdout step took. Null: shown when finished.
    Column("published_at", DateTime(timezone=True)),
    Column("updated_at", DateTime(timezone=True), nullable=False),
    # sha256 of (team, dataset, configuration fingerprint, policy version): one submission per key under
    # any concurrency. A canceled submission or one failed by the infrastructure gets "reopened:<id>",
    # so the configuration may run again; null on rows from before the column.
    Column("config_key", String(64)),
    UniqueConstraint("owner_key_id", "idempotency_key", name="uq_submission_idempotency"),
    Index("uq_submissions_config_key", "config_key", unique=True),
    Index("ix_submissions_team_created", "team", "created_at"),
    Index("ix_submissions_state", "state"),
    Index("ix_submissions_config", "dataset_id", "config_fingerprint"),
)

fold_results = Table(
    "fold_results",
    metadata,
    Column("submission_id", ForeignKey("submissions.id"), primary_key=True),
    Column("repeat", Integer, primary_key=True),
    Column("fold", Integer, primary_key=True),
    Column("status", String(20), nullable=False),  # "ok" | "failed"
    Column("train_rows", Integer, nullable=False),
    Column("test_rows", Integer, nullable=False),
    Column("scores", JSON),
    Column("undefined", JSON),  # {metric: why scikit-learn could not compute it on the test rows} or null
    Column("baseline_scores", JSON),
    Column("coefficients", JSON),  # {"names": [...], "values": [[...] per output]} or null
    Column("train_scores", JSON),  # the same metrics on the fold's own training rows, or null
    Column("train_scored_rows", Integer),  # how many of them: all, or a seeded sample above 100,000
    Column("curve", JSON),  # learning-curve points [{"fraction", "train_rows", "train_scores", "scores"}] or null
    Column("search", JSON),  # nested search: {"best_params", "best_inner_score", "scoring"} or null
    # classification with probabilities: per-bin counts and sums of the test rows' predicted probabilities
    # and outcomes (worker.learning.calibration), pooled into the reliability curve; never a per-row value
    Column("calibration", JSON),
    Column("fit_seconds", Float),
    Column("score_seconds", Float),
    Column("error", Text),
    Column("finished_at", DateTime(timezone=True), nullable=False),
)

holdout_scores = Table(
    "holdout_scores",
    metadata,
    # One row per submission, ever: the primary key is what makes "scored once" hold under retries.
    Column("submission_id", ForeignKey("submissions.id"), primary_key=True),
    Column("scores", JSON, nullable=False),
    Column("holdout_fingerprint", String(64), nullable=False),
    Column("fit_seconds", Float),
    Column("scored_at", DateTime(timezone=True), nullable=False),
    # Set when the one attempt failed (refit or scoring); scores is then {}. Never holdout values.
    Column("error", Text),
)

holdout_claims = Table(
    "holdout_claims",
    metadata,
    # Which holdout job computes a submission's one holdout outcome. The primary key lets one job win
    # the insert; the winner's heartbeat keeps the claim, and only a claim gone stale can be taken over
    # (a conditional update that one caller wins), so two live jobs never both refit and score.
    Column("submission_id", ForeignKey("submissions.id"), primary_key=True),
    Column("token", String(40), nullable=False),
    Column("heartbeat_at", DateTime(timezone=True), nullable=False),
    # When the holder opened the sealed rows: from then on the one attempt is spent. An attempt that ends
    # without an outcome after this (a crash, a kill, a bound) is stored as failed, never computed again.
    Column("opened_at", DateTime(timezone=True)),
    # The moment fixed, before opening them, by which the step on the sealed rows must have stored its outcome
    # (service.gate.timing); the verdict is shown no earlier.
    Column("deadline_at", DateTime(timezone=True)),
    # The earlier moment, fixed the same way, at which a verdict given by then is shown; one given later
    # because of the sealed step is shown as if there were none, and counted once more.
    Column("prompt_at", DateTime(timezone=True)),
)

policies = Table(
    "policies",
    metadata,
    # Versioned: a PUT adds a row; a verdict records the version it was judged under.
    Column("dataset_id", ForeignKey("datasets.id"), primary_key=True),
    Column("version", Integer, primary_key=True),
    Column("document", JSON, nullable=False),
    Column("set_by", String(40), nullable=False),
    Column("set_at", DateTime(timezone=True), nullable=False),
)

champions = Table(
    "champions",
    metadata,
    # History of promotions; the champion in force is the newest row of a dataset.
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("dataset_id", ForeignKey("datasets.id"), nullable=False, index=True),
    Column("submission_id", ForeignKey("submissions.id"), nullable=False),
    Column("promoted_by", String(40), nullable=False),
    Column("promoted_at", DateTime(timezone=True), nullable=False),
)

verdicts = Table(
    "verdicts",
    metadata,
    # Every verdict a submission was given, oldest first: the first by the verdict job, later ones when a
    # steward re-judged it under a newer policy or champion. submissions.verdict is the newest of them.
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("submission_id", ForeignKey("submissions.id"), nullable=False),
    Column("dataset_id", ForeignKey("datasets.id"), nullable=False),
    Column("owner_key_id", String(40), nullable=False),  # the submission's owner, whose holdout budget is used
    Column("policy_version", Integer),  # the policy it was judged under (null: records from before versions)
    Column("champion_id", String(40)),  # the champion it was judged against (null: none)
    Column("verdict", JSON, nullable=False),
    Column("judged_by", String(40), nullable=False),  # "system" (the verdict job) or the re-judging steward's key
    Column("judged_at", DateTime(timezone=True), nullable=False),
    # Units of the owner's holdout budget this verdict used: 1 when a re-judge asked the holdout a question
    # no earlier verdict had answered (the holdout-gap rule under new parameters), else 0.
    Column("holdout_spent", Integer, nullable=False, server_default="0"),
    Index("ix_verdicts_submission", "submission_id", "id"),
    Index("ix_verdicts_spent", "dataset_id", "owner_key_id", "judged_at"),
)

holdout_releases = Table(
    "holdout_releases",
    metadata,
    # What a submitter was shown of the holdout; the raw score stays in holdout_scores.
    Column("submission_id", ForeignKey("submissions.id"), primary_key=True),
    Column("dataset_id", ForeignKey("datasets.id"), nullable=False),
    Column("owner_key_id", String(40), nullable=False),
    Column("mode", String(20), nullable=False),
    Column("released", JSON),  # {metric: value} as released, or null when withheld
    Column("spent", Integer, nullable=False),  # units of the submitter's budget this release used
    Column("state", JSON, nullable=False),  # mechanism state after this release (ladder best, budget left)
    Column("withheld_until", DateTime(timezone=True)),
    Column("released_at", DateTime(timezone=True), nullable=False),
    Column("policy_version", Integer),  # the policy released under; null on rows from before it was kept
    Column("identity", String(100)),  # whose budget the query spent; null on older rows: owner_key_id's
    Column("outcome", String(20)),  # released | withheld | failed; null on older rows (read from released)
    # Shown later than its prompt time because of the sealed step: that bit was one of the units spent.
    Column("late", Boolean),
    Index("ix_releases_owner", "dataset_id", "owner_key_id", "released_at"),
    Index("ix_releases_identity", "dataset_id", "identity", "released_at"),
)

champion_tests = Table(
    "champion_tests",
    metadata,
    # The champion decision on the sealed rows, once per submission (primary key), and the dataset's
    # stream of them for the online procedure: the rows with a ``seq`` are the tests, in order; a row
    # without one records a decision not made (budget spent, nothing kept), which advances nothing.
    Column("submission_id", ForeignKey("submissions.id"), primary_key=True),
    Column("dataset_id", ForeignKey("datasets.id"), nullable=False),
    Column("champion_id", ForeignKey("submissions.id"), nullable=False),
    Column("seq", Integer),  # 1-based place in the dataset's stream; null when no test was made
    Column("level", Float),  # the level the test ran at (what the online procedure allowed)
    Column("passed", Boolean),  # whether non-inferiority was shown (H0 rejected)
    Column("entry", JSON, nullable=False),  # the verdict's rule entry: outcome, level, sentence
    Column("tested_at", DateTime(timezone=True), nullable=False),
    UniqueConstraint("dataset_id", "seq", name="uq_champion_tests_seq"),
)

champion_folds = Table(
    "champion_folds",
    metadata,
    # The champion's configuration scored on another fold plan (a candidate's 5x2cv or fold-count
    # override), so the CV comparison with it is paired; cached per (champion, plan) for every later
    # candidate on that plan. ``plan`` is "<scheme>-<folds>-<seed>".
    Column("champion_id", ForeignKey("submissions.id"), primary_key=True),
    Column("plan", String(80), primary_key=True),
    Column("repeat", Integer, primary_key=True),
    Column("fold", Integer, primary_key=True),
    Column("status", String(20), nullable=False),  # ok | failed (the estimator's own error)
    Column("scores", JSON),
    Column("train_rows", Integer, nullable=False),
    Column("test_rows", Integer, nullable=False),
    Column("error", Text),
    Column("finished_at", DateTime(timezone=True), nullable=False),
)

audit_events = Table(
    "audit_events",
    metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("at", DateTime(timezone=True), nullable=False),
    Column("actor", String(40), nullable=False),  # key id, or "system"
    Column("team", String(100), nullable=False),
    Column("action", String(60), nullable=False),
    Column("subject", String(80), nullable=False),
    Column("detail", JSON, nullable=False),
)

deployment = Table(
    "deployment",
    metadata,
    # Facts about the deployment as a whole, e.g. the data identity (service.ops.data_identity).
    Column("name", String(60), primary_key=True),
    Column("value", String(200), nullable=False),
)
