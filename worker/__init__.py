"""Queue workers of the closure service (rq): tasks, queue glue, the worker process."""
