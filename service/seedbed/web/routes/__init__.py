"""HTTP routes, grouped by what they serve."""
