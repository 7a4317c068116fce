"""cardiosieve pipeline: contract, loading, alignment, quality, worklist and the nightly run."""

# The one wording of the screening caution: printed by the CLI, stored with the worklist.
CAUTION = ("Screening aid for human review, not a diagnosis: every item must be checked by a qualified "
           "clinician against the full ECG and the patient's record, under local protocols.")
