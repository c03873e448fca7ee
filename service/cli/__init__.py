"""The command-line side: ``sealfold`` commands, the HTTP client, the embedded stack and the demo."""
