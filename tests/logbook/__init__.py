"""The logbook (feedmatch.logbook): logging under faults, identities, the report and its plots."""
