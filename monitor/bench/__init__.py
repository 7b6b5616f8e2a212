"""`comove bench ...`: measured figures for each stage against its targets."""
