"""triage engine layer."""
