"""predictor: forecast longitudinal brain-MRI change on a CPU (research use only)."""

__version__ = "0.1.0"
