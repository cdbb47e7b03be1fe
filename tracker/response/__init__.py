"""Treatment response: is the patient better, stable or worse on each treatment regimen?

Pure arithmetic on plain data (no database, no user interface), like :mod:`tracker.criteria`:

- :mod:`.scales` — outcome scales as reference data (range, direction, minimal important change) and the
  computed scales (INCAT from its grades, adjusted INCAT, the weaker hand's grip);
- :mod:`.regimens` — treatment periods → regimens (a change of dose or interval starts a new one);
- :mod:`.change` — score changes against their minimal important change, nerve conduction changes
  against the smallest detectable change, with the conditions that make a change less certain;
- :mod:`.trend` — slope per year with its 95 % confidence interval;
- :mod:`.rules` — named response rule sets (data with sources) and the per-regimen classification.

Clinical decision support only: every classification must be reviewed by a qualified clinician.
"""
