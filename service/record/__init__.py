"""The canonical certificate record: built from a run, an outcome and a seed; the same bytes every time."""
