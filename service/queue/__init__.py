"""Work queue: queue entries ("jobs") in the database and the embedded worker pool that runs them."""
