"""Work queue: queue entries ("jobs") in the database, the embedded worker pool that runs them
(``jobs``), and the adapter that hands them to an existing distributed task queue instead
(``engine``: Celery with a Redis broker), chosen by configuration."""
