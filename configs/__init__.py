"""Package data, not code: the shipped configs, installed as ``pairvel.configs`` (see pyproject.toml)."""
