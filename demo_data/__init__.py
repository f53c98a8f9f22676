"""Package data, not code: the demo survey, installed as ``pairvel.demo_data`` (see pyproject.toml)."""
