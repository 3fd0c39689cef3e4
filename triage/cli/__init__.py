"""triage cli layer."""
