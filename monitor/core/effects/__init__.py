"""What a manipulation did: per-animal effects against a matched baseline, the cohort's trend against the
stage at which each was made, and the manipulation log.

Rule: pure (numpy/scipy); it comes after eligibility and consolidation and may use them, none of them uses it.
"""
