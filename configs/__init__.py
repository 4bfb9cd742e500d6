"""Default configuration files (TOML), shipped with the package as predictor.configs."""
