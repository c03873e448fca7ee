"""The worker's process machinery: the main loop, job placement, the fold process and warm-up."""
