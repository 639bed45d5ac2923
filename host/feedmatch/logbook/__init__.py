"""The station logbook: the SQLite store, the logger that fills it, the reports that read it."""
