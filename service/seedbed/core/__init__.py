"""The initialization core: pure numpy/pydantic, no web imports (a test enforces this)."""
