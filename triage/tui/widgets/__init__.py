"""triage tui widgets layer."""
