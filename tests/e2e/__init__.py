"""End-to-end tests: the real service under uvicorn, spoken to over loopback HTTP."""
