"""The caution every output that a clinician may read carries."""

CAUTION = (
    "Decision support only: figures and suggestions are for the treating clinician, "
    "to be checked against local protocols and licensed practice."
)
