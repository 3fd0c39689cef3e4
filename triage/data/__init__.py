"""triage data layer."""
