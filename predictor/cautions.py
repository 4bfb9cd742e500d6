"""The cautions every forecast output carries (command line, reports, figures, provenance)."""

CAUTION = (
    "Research use only: not for diagnosis or treatment decisions. Forecasts are model "
    "estimates with stated uncertainty; clinical judgement and local regulations govern "
    "any use with patients."
)
#: two lines for figure captions
CAPTION = (
    "Research use only - not for diagnosis or treatment decisions. Model estimates with\n"
    "stated uncertainty; clinical judgement and local regulations govern any use with patients."
)
