"""Stage models: candidates, grouped cross-validation, intervals, domain, registry."""
