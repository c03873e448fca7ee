"""sealfold: a review gate for predictive models.

The ``service`` package is the API process and the core it shares with the workers. Its core modules
(settings, errors, records, vault, catalog, configs, dispatch) import neither Flask nor scikit-learn;
only ``service.api`` and ``service.app`` import Flask, and only the ``worker`` package imports
scikit-learn.
"""

__version__ = "0.1.0"
