"""Configuration: TOML validated into frozen dataclasses, units, the embedded default."""
