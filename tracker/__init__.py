"""ncs-tracker: longitudinal follow-up of serial nerve conduction studies in demyelinating neuropathies.

Clinical decision support only: every result must be reviewed by a qualified clinician; local laboratory
normal values, local rules and licensed practice prevail.
"""

__version__ = "0.1.0"

CAUTION = (
    "Decision support only, not a diagnosis: results must be reviewed by a qualified clinician; "
    "local laboratory normal values, local rules and licensed practice prevail."
)
