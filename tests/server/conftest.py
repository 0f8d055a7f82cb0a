"""Server tests: fixtures come from support.fixtures (registered in tests/conftest.py)."""
