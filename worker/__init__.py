"""sealfold's RQ workers: the only package that imports scikit-learn.

``worker.jobs`` holds the job functions the API enqueues by dotted name; ``worker.process.main`` runs a
worker that preloads scikit-learn before forking and refuses any other function name.
"""
