"""Plan and bench files (TOML), validated by pydantic into typed settings."""
