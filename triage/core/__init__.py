"""triage core layer."""
