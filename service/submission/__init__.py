"""A submission's life: its configuration, intake, dispatch to the queue, and the document clients read."""
