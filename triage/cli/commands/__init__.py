"""triage cli commands layer."""
