"""Phantom scenarios (TOML), shipped with the package as predictor.scenarios."""
