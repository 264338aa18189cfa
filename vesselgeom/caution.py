"""The research-use caution printed by the command line and written into every report and picture."""

__all__ = ["CAUTION"]

CAUTION = (
    "Research use only. Not a medical device; not for diagnosis or treatment decisions. "
    "Defer to qualified clinicians and local regulations."
)
