"""triage views layer."""
