"""triage tui layer."""
