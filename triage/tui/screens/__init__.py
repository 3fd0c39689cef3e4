"""triage tui screens layer."""
