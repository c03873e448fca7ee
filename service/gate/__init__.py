"""The review gate: policy, paired statistics, the verdict, holdout release, the board and review state."""
