"""Result types: the frozen values a computation hands up to the engine, views, CLI and app.

Nothing here computes. `core` builds these values (its accumulators' ``finalize`` returns
them), `engine` bundles them with what they were computed on, and `views`, `cli` and `tui`
read them. The package sits below `core`: at run time it imports only numpy and
`triage._typing`; a few fields name a core object (the spec, design builder and fit of
`FitOutcome`, the held-out rule of `ComparisonOutcome`), imported for type checking only.
Import the submodules directly: this file re-exports nothing, so importing one result type
never loads the others.
"""
